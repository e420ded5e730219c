-- Whether a token came from a tokens file (`serve --tokens-file`, `token sync`; store::token_file):
-- such a token is revoked when the file no longer holds it. FALSE for tokens made with `token create`.
ALTER TABLE tokens ADD COLUMN from_file BOOLEAN NOT NULL DEFAULT FALSE;
