//! Shared helpers for the integration tests and reference checks; [`service`] starts the real service.

pub mod chaos;
pub mod mna;
pub mod nesting;
pub mod pg;
pub mod population;
pub mod procstat;
pub mod service;
pub mod synth;
pub mod vector_fit_synth;

use std::path::PathBuf;
use std::process::Command;

/// The repository root.
pub fn repo_root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests/ sits in the repository root")
        .to_path_buf()
}

/// `../shared/real-sweeps` (genuine measurements, read where they lie, never copied), or `None` with a
/// note on standard error when that folder is absent, so the checks that use it are skipped.
pub fn real_sweeps_dir() -> Option<PathBuf> {
    let dir = repo_root().join("../shared/real-sweeps");
    if dir.join("SOURCES.md").is_file() {
        Some(dir)
    } else {
        eprintln!(
            "note: {} is absent; the real-sweep checks are skipped",
            dir.display()
        );
        None
    }
}

/// The Touchstone files in the real-sweeps folder `dir`, sorted by name.
pub fn real_sweep_files(dir: &std::path::Path) -> Vec<String> {
    let mut files: Vec<String> = std::fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .filter(|n| n.ends_with(".s1p"))
        .collect();
    files.sort();
    files
}

/// The Python interpreter that has numpy, scipy and scikit-rf: `$HENRYBOOK_PYTHON`, or the venv that
/// `.ci/setup` makes in `target/pyref`. Panics with the set-up command when neither exists, so a
/// reference check never passes silently.
pub fn reference_python() -> PathBuf {
    if let Ok(p) = std::env::var("HENRYBOOK_PYTHON") {
        return PathBuf::from(p);
    }
    let venv = repo_root().join("target/pyref/bin/python");
    assert!(
        venv.exists(),
        "reference checks need Python with numpy, scipy and scikit-rf: run `bash .ci/setup` \
         (or set HENRYBOOK_PYTHON)"
    );
    venv
}

/// Runs `tests/python/<script>` with the reference Python and returns its standard output parsed as JSON.
/// `stdin` is written to the script's standard input.
pub fn run_reference_script(script: &str, args: &[&str], stdin: &str) -> serde_json::Value {
    use std::io::Write;
    let path = repo_root().join("tests/python").join(script);
    let mut child = Command::new(reference_python())
        .arg(&path)
        .args(args)
        .env("OPENBLAS_NUM_THREADS", "1")
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("cannot start {}: {e}", path.display()));
    child
        .stdin
        .take()
        .expect("stdin is piped")
        .write_all(stdin.as_bytes())
        .expect("write to the reference script");
    let out = child.wait_with_output().expect("reference script runs");
    assert!(
        out.status.success(),
        "{} failed: {}",
        path.display(),
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| {
        panic!(
            "{} printed no JSON ({e}): {}",
            path.display(),
            String::from_utf8_lossy(&out.stdout)
        )
    })
}
