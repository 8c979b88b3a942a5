-- 002: which claim of a drop file each drop_files row records.
-- A file being processed sits in <inbox>/processing/<name>.<pid>.<token>; the random
-- token is written with the outcome, in the same transaction as the data. After a crash
-- between that commit and the move out of processing/, the next pass finds the row by
-- token and only finishes the move: no file is applied or logged twice. NULL for rows
-- not written by the drop-file ingestion.
ALTER TABLE drop_files ADD COLUMN claim_token VARCHAR;
