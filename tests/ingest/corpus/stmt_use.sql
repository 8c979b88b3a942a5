USE other;
