-- nothing today
/* still nothing */
