-- tries to wipe the history
DELETE FROM factor_returns;
