//! Finds the Python interpreter that the reference checks run under.
//!
//! `scripts/test` creates `.venv` with the reference packages (scikit-learn and its
//! dependencies) and exports `TAMIS_PYTHON`; a plain `cargo test` falls back to
//! `.venv/bin/python` in the repository. A missing interpreter fails the test with
//! instructions rather than skipping it: a skipped reference check proves nothing.

use std::path::PathBuf;
use std::process::{Command, Stdio};

/// Path of the Python interpreter with the reference packages installed.
pub fn interpreter() -> PathBuf {
    if let Some(path) = std::env::var_os("TAMIS_PYTHON") {
        return PathBuf::from(path);
    }
    let venv = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(".venv/bin/python");
    assert!(
        venv.exists(),
        "no Python for the reference checks: run `scripts/test` once (it creates .venv), \
         or set TAMIS_PYTHON to an interpreter with scikit-learn installed"
    );
    venv
}

/// Runs `script` (Python source) with `args`, feeding `stdin`, and returns its stdout.
/// Panics with Python's stderr when the script fails, so the test report shows why.
pub fn run(script: &str, args: &[&str], stdin: &[u8]) -> Vec<u8> {
    use std::io::Write;
    let mut child = Command::new(interpreter())
        .arg("-c")
        .arg(script)
        .args(args)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start the Python interpreter");
    let mut input = child.stdin.take().expect("stdin is piped");
    let feed = stdin.to_vec();
    let writer = std::thread::spawn(move || input.write_all(&feed));
    let output = child.wait_with_output().expect("wait for Python");
    writer
        .join()
        .expect("stdin writer thread")
        .expect("write stdin to Python");
    assert!(
        output.status.success(),
        "Python reference script failed:\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    output.stdout
}
