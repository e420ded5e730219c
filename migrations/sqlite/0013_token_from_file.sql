-- Whether a token came from a tokens file (`serve --tokens-file`, `token sync`; store::token_file):
-- such a token is revoked when the file no longer holds it. 0 for tokens made with `token create`.
ALTER TABLE tokens ADD COLUMN from_file INTEGER NOT NULL DEFAULT 0 CHECK (from_file IN (0, 1));
