-- 002: which claim of a drop file each drop_files row records.
-- A file being processed sits in <inbox>/processing/<name>.<pid>.<random>; that claim
-- name is written with the outcome, in the same transaction as the data. After a crash
-- between the commit and the move out of processing/, the next pass finds the row by
-- claim name and only finishes the move: no file is applied or logged twice.
ALTER TABLE drop_files ADD COLUMN claim_name VARCHAR;
