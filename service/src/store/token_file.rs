//! Tokens kept in a file (a cluster Secret mounted as a file, say) rather than made one at a time
//! with `henrybook token create`.
//!
//! The file holds one token per line, as three fields separated by blanks:
//!
//! ```text
//! # role      label            token (at least 32 printable ASCII characters, no blanks)
//! engineer    qa-lead          5b0e…64 hex digits…
//! reader      design-tool      9f1c…
//! ```
//!
//! Blank lines and lines starting with `#` are skipped. Only each token's SHA-256 goes to the
//! database, as for created tokens. Applying the file ([`plan`], then each store's `sync_tokens`)
//! makes the database agree with it: a token new to the database is added (marked as coming from
//! the file), one whose role or label changed in the file is changed, and a token that came from the
//! file and is no longer in it is revoked. Tokens made with `token create` are left alone. A revoked
//! token stays revoked even when the file still holds it: the file must get a new one. Every change
//! is recorded in the audit trail.
//!
//! Errors name the line and never echo a token.

use super::sha256_hex;
use super::tokens::Role;
use std::collections::HashMap;

/// Fewest characters a token in the file may have (32 hex digits are 128 random bits).
pub const MIN_TOKEN_CHARS: usize = 32;
/// Most characters a token or a label in the file may have.
pub const MAX_FIELD_CHARS: usize = 256;

/// One token of the file, with the line it is on.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FileToken {
    pub line: usize,
    pub role: Role,
    pub label: String,
    /// The token's SHA-256, hex (the token itself is not kept).
    pub sha256: String,
}

/// Reads a tokens file's text. `Err` names the line and what is wrong with it; a file with no token
/// is refused (an empty mount would otherwise revoke every token the file gave).
pub fn parse(text: &str) -> Result<Vec<FileToken>, String> {
    let mut tokens: Vec<FileToken> = Vec::new();
    let mut labels: HashMap<String, usize> = HashMap::new();
    let mut hashes: HashMap<String, usize> = HashMap::new();
    for (index, raw) in text.lines().enumerate() {
        let line = index + 1;
        let content = raw.trim();
        if content.is_empty() || content.starts_with('#') {
            continue;
        }
        let fields: Vec<&str> = content.split_whitespace().collect();
        let [role, label, token] = fields[..] else {
            return Err(format!(
                "line {line}: expected three fields separated by blanks (role, label, token), found {}",
                fields.len()
            ));
        };
        let role = Role::parse(role).ok_or_else(|| {
            let shown: String = role.chars().take(40).collect();
            format!(
                "line {line}: unknown role {shown:?}; the roles are reader, inspector and engineer"
            )
        })?;
        if label.chars().count() > MAX_FIELD_CHARS || label.chars().any(char::is_control) {
            return Err(format!(
                "line {line}: a label has at most {MAX_FIELD_CHARS} characters and no control characters"
            ));
        }
        let length = token.chars().count();
        if length < MIN_TOKEN_CHARS {
            return Err(format!(
                "line {line}: the token of {label} has {length} characters; a token needs at least \
                 {MIN_TOKEN_CHARS} (for example 64 hex digits from a random source)"
            ));
        }
        if length > MAX_FIELD_CHARS || !token.bytes().all(|b| b.is_ascii_graphic()) {
            return Err(format!(
                "line {line}: the token of {label} must be at most {MAX_FIELD_CHARS} printable ASCII \
                 characters"
            ));
        }
        if let Some(first) = labels.insert(label.to_string(), line) {
            return Err(format!(
                "line {line}: the label {label} is already given on line {first}"
            ));
        }
        let sha256 = sha256_hex(token.as_bytes());
        if let Some(first) = hashes.insert(sha256.clone(), line) {
            return Err(format!(
                "line {line}: the token of {label} is the same as the one on line {first}"
            ));
        }
        tokens.push(FileToken {
            line,
            role,
            label: label.to_string(),
            sha256,
        });
    }
    if tokens.is_empty() {
        return Err(
            "the file holds no token (to take every token away, revoke them with \
             `henrybook token revoke`)"
                .to_string(),
        );
    }
    Ok(tokens)
}

/// Most bytes a tokens file may have (a few thousand tokens).
pub const MAX_FILE_BYTES: u64 = 1 << 20;

/// Reads and parses the tokens file at `path`. Returns its tokens and the SHA-256 of its bytes (the
/// service reads the file again only to see whether that changed). Errors name the file and the line.
pub fn load(path: &std::path::Path) -> anyhow::Result<(Vec<FileToken>, String)> {
    use anyhow::Context;
    use std::io::Read;
    let shown = path.display();
    let file = std::fs::File::open(path)
        .with_context(|| format!("cannot open the tokens file {shown}"))?;
    let mut bytes = Vec::new();
    file.take(MAX_FILE_BYTES + 1)
        .read_to_end(&mut bytes)
        .with_context(|| format!("cannot read the tokens file {shown}"))?;
    anyhow::ensure!(
        bytes.len() as u64 <= MAX_FILE_BYTES,
        "the tokens file {shown} is larger than {MAX_FILE_BYTES} bytes"
    );
    let digest = sha256_hex(&bytes);
    let text = String::from_utf8(bytes).map_err(|e| {
        let at = e.utf8_error().valid_up_to();
        let line = e.as_bytes()[..at].iter().filter(|&&b| b == b'\n').count() + 1;
        anyhow::anyhow!("the tokens file {shown}, line {line}: not UTF-8 text")
    })?;
    let tokens = parse(&text).map_err(|e| anyhow::anyhow!("the tokens file {shown}, {e}"))?;
    Ok((tokens, digest))
}

/// A token row as the sync reads it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StoredToken {
    pub token_id: i64,
    pub sha256: String,
    pub role: String,
    pub label: String,
    pub revoked: bool,
    pub from_file: bool,
}

/// The columns of a [`StoredToken`], in its order (both backends).
pub(crate) const STORED_COLUMNS: &str = "token_id, token_sha256, role, label, \
     revoked_at_ms IS NOT NULL, from_file";

/// One change the file asks of the database.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Step {
    /// A token not yet in the database.
    Add(FileToken),
    /// An active token whose role or label the file changes (or a created token the file now holds:
    /// it is marked as coming from the file).
    Change {
        token_id: i64,
        role: Role,
        label: String,
        reason: String,
    },
    /// A token from the file that is no longer in it.
    Revoke {
        token_id: i64,
        role: String,
        label: String,
    },
}

impl Step {
    /// The audit action and reason of this step once a store has applied it; `added_id` is the id
    /// the store gave an added token (ignored for the other steps).
    pub(crate) fn audit(&self, added_id: i64) -> (&'static str, String) {
        match self {
            Step::Add(entry) => ("token-added", added_reason(added_id, entry)),
            Step::Change { reason, .. } => ("token-changed", reason.clone()),
            Step::Revoke {
                token_id,
                role,
                label,
            } => ("token-revoked", dropped_reason(*token_id, role, label)),
        }
    }
}

/// What applying a file did, as `token sync` and the service's log report it.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TokenSync {
    /// `label (role)` of each token added, changed and revoked.
    pub added: Vec<String>,
    pub changed: Vec<String>,
    pub revoked: Vec<String>,
    /// Tokens of the file already in the database as the file says.
    pub unchanged: usize,
    /// Tokens of the file that were revoked before and stay so: `label (line N, token id K)`.
    pub still_revoked: Vec<String>,
}

impl TokenSync {
    /// One line: the counts, then the labels of what changed and what stays revoked.
    pub fn summary(&self) -> String {
        let mut text = format!(
            "{} added, {} changed, {} revoked, {} unchanged",
            self.added.len(),
            self.changed.len(),
            self.revoked.len(),
            self.unchanged
        );
        for (what, list) in [
            ("added", &self.added),
            ("changed", &self.changed),
            ("revoked", &self.revoked),
        ] {
            if !list.is_empty() {
                text.push_str(&format!("; {what}: {}", list.join(", ")));
            }
        }
        if !self.still_revoked.is_empty() {
            text.push_str(&format!(
                "; still revoked (put a new token in the file): {}",
                self.still_revoked.join(", ")
            ));
        }
        text
    }
}

/// The steps that make `stored` agree with `file`, and what the sync will report (the ids of added
/// tokens are not known yet: [`TokenSync::added`] names them by label).
pub fn plan(file: &[FileToken], stored: &[StoredToken]) -> (Vec<Step>, TokenSync) {
    let by_hash: HashMap<&str, &StoredToken> =
        stored.iter().map(|t| (t.sha256.as_str(), t)).collect();
    let mut steps = Vec::new();
    let mut report = TokenSync::default();
    for entry in file {
        let shown = format!("{} ({})", entry.label, entry.role.as_str());
        match by_hash.get(entry.sha256.as_str()) {
            None => {
                steps.push(Step::Add(entry.clone()));
                report.added.push(shown);
            }
            Some(t) if t.revoked => report.still_revoked.push(format!(
                "{} (line {}, token {})",
                entry.label, entry.line, t.token_id
            )),
            Some(t) if t.role == entry.role.as_str() && t.label == entry.label && t.from_file => {
                report.unchanged += 1;
            }
            Some(t) => {
                let mut what = Vec::new();
                if t.role != entry.role.as_str() {
                    what.push(format!("role {} to {}", t.role, entry.role.as_str()));
                }
                if t.label != entry.label {
                    what.push(format!("label {} to {}", t.label, entry.label));
                }
                if !t.from_file {
                    what.push("now kept in the tokens file".to_string());
                }
                steps.push(Step::Change {
                    token_id: t.token_id,
                    role: entry.role,
                    label: entry.label.clone(),
                    reason: format!("token {}: {}", t.token_id, what.join(", ")),
                });
                report.changed.push(shown);
            }
        }
    }
    let in_file: std::collections::HashSet<&str> = file.iter().map(|e| e.sha256.as_str()).collect();
    for t in stored {
        if t.from_file && !t.revoked && !in_file.contains(t.sha256.as_str()) {
            steps.push(Step::Revoke {
                token_id: t.token_id,
                role: t.role.clone(),
                label: t.label.clone(),
            });
            report.revoked.push(format!("{} ({})", t.label, t.role));
        }
    }
    (steps, report)
}

/// The audit reason of a token the file added.
fn added_reason(token_id: i64, entry: &FileToken) -> String {
    format!(
        "token {token_id} ({}, {}) from line {} of the tokens file",
        entry.role.as_str(),
        entry.label,
        entry.line
    )
}

/// The audit reason of a token revoked because the file no longer holds it.
fn dropped_reason(token_id: i64, role: &str, label: &str) -> String {
    format!("token {token_id} ({role}, {label}): no longer in the tokens file")
}

#[cfg(test)]
mod tests {
    use super::*;

    const A: &str = "0123456789abcdef0123456789abcdef";
    const B: &str = "fedcba9876543210fedcba9876543210";

    #[test]
    fn a_file_is_read_line_by_line_and_only_hashes_are_kept() {
        let text = format!("# tokens\n\n  engineer  qa-lead {A}\nreader design-tool\t{B}  \n");
        let tokens = parse(&text).unwrap();
        assert_eq!(tokens.len(), 2);
        assert_eq!(
            tokens[0],
            FileToken {
                line: 3,
                role: Role::Engineer,
                label: "qa-lead".into(),
                sha256: sha256_hex(A.as_bytes()),
            }
        );
        assert_eq!((tokens[1].line, tokens[1].role), (4, Role::Reader));
    }

    #[test]
    fn each_bad_line_is_named_and_no_token_is_echoed() {
        let cases = [
            (
                format!("engineer qa {A} extra"),
                "line 1: expected three fields",
            ),
            (format!("\nboss qa {A}"), "line 2: unknown role \"boss\""),
            (
                "reader qa short-secret".to_string(),
                "line 1: the token of qa has 12 characters",
            ),
            (format!("reader qa {A}é"), "printable ASCII"),
            (
                format!("reader qa {A}\nreader qa {B}"),
                "line 2: the label qa is already given on line 1",
            ),
            (
                format!("reader qa {A}\nengineer qb {A}"),
                "line 2: the token of qb is the same as the one on line 1",
            ),
            ("# nothing\n\n".to_string(), "holds no token"),
        ];
        for (text, expected) in cases {
            let err = parse(&text).unwrap_err();
            assert!(err.contains(expected), "{text:?}: {err}");
            assert!(
                !err.contains(A) && !err.contains(B),
                "a token was echoed: {err}"
            );
        }
    }

    fn stored(
        id: i64,
        token: &str,
        role: &str,
        label: &str,
        revoked: bool,
        from_file: bool,
    ) -> StoredToken {
        StoredToken {
            token_id: id,
            sha256: sha256_hex(token.as_bytes()),
            role: role.into(),
            label: label.into(),
            revoked,
            from_file,
        }
    }

    #[test]
    fn the_plan_adds_changes_and_revokes_only_what_the_file_governs() {
        const C: &str = "cccccccccccccccccccccccccccccccc";
        const D: &str = "dddddddddddddddddddddddddddddddd";
        const E: &str = "eeeeeeeeeeeeeeeeeeeeeeeeeeeeeeee";
        let file = parse(&format!(
            "engineer lead {A}\ninspector bench {B}\nreader old {C}\nreader new {E}\n"
        ))
        .unwrap();
        let db = [
            // A: from the file, unchanged.
            stored(1, A, "engineer", "lead", false, true),
            // B: the file raises its role.
            stored(2, B, "reader", "bench", false, true),
            // C: revoked before; it stays revoked.
            stored(3, C, "reader", "old", true, true),
            // D: from the file, no longer in it: revoked.
            stored(4, D, "engineer", "gone", false, true),
            // A token made with `token create`: left alone.
            stored(
                5,
                "created-by-hand-created-by-hand-",
                "engineer",
                "hand",
                false,
                false,
            ),
        ];
        let (steps, report) = plan(&file, &db);
        assert_eq!(steps.len(), 3, "{steps:?}");
        assert!(
            matches!(&steps[0], Step::Change { token_id: 2, role: Role::Inspector, reason, .. }
            if reason == "token 2: role reader to inspector")
        );
        assert!(matches!(&steps[1], Step::Add(t) if t.label == "new"));
        assert!(matches!(&steps[2], Step::Revoke { token_id: 4, .. }));
        assert_eq!(report.unchanged, 1);
        assert_eq!(report.still_revoked, ["old (line 3, token 3)"]);
        assert_eq!(
            report.summary(),
            "1 added, 1 changed, 1 revoked, 1 unchanged; added: new (reader); changed: bench \
             (inspector); revoked: gone (engineer); still revoked (put a new token in the file): old \
             (line 3, token 3)"
        );
        // Applied, the same file asks nothing more.
        let after = [
            stored(1, A, "engineer", "lead", false, true),
            stored(2, B, "inspector", "bench", false, true),
            stored(3, C, "reader", "old", true, true),
            stored(4, D, "engineer", "gone", true, true),
            stored(6, E, "reader", "new", false, true),
        ];
        let (steps, report) = plan(&file, &after);
        assert!(steps.is_empty(), "{steps:?}");
        assert_eq!(report.unchanged, 3);
    }
}
