//! Helpers shared by the test modules.

use std::path::{Path, PathBuf};

use braid::data::{self, Panel, ReadOptions, Roles};

/// The repository's test-data folder.
pub fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("data")
}

/// A fresh temporary folder for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("braid-test-{}-{name}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// Roles with only the three required columns.
pub fn roles(id: &str, age: &str, outcome: &str) -> Roles {
    Roles {
        id: id.into(),
        age: age.into(),
        outcome: outcome.into(),
        ..Default::default()
    }
}

/// Load a file from tests/data.
pub fn load(file: &str, roles: &Roles) -> Panel {
    data::load(&data_dir().join(file), roles, ReadOptions::default()).unwrap()
}

/// The braid binary built for these tests.
pub fn braid_bin() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_braid"))
}

/// A command that runs the braid binary built for these tests.
pub fn braid() -> std::process::Command {
    std::process::Command::new(braid_bin())
}

/// Runs a braid command and returns its output, failing the test with
/// braid's own error text when it did not succeed.
pub fn run_ok(cmd: &mut std::process::Command) -> std::process::Output {
    let out = cmd.output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    out
}

/// Fails the test unless the command printed every one of these words.
pub fn expect_words(out: &std::process::Output, words: &[&str], what: &str) {
    let stdout = String::from_utf8_lossy(&out.stdout);
    for word in words {
        assert!(stdout.contains(word), "{what} lacks '{word}'");
    }
}

/// Fails the test unless the JSON object has every one of these keys.
pub fn expect_keys(v: &serde_json::Value, keys: &[&str], what: &str) {
    for key in keys {
        assert!(v.get(key).is_some(), "{what} lacks '{key}'");
    }
}

/// A REML fit of a problem that is known to fit (test data only).
pub fn reml(problem: &braid::lmm::MixedProblem) -> braid::lmm::Fit {
    braid::lmm::fit(
        problem,
        braid::lmm::FitOptions {
            method: braid::lmm::Method::Reml,
            ..Default::default()
        },
    )
    .unwrap()
}

/// Fit a panel with a model and a trajectory request through the library's
/// validated request, with the predictions (so the fit keeps its values per
/// row and per level).
pub fn fit(
    panel: &Panel,
    spec: &braid::spec::ModelSpec,
    trajectory: &braid::infer::TrajectoryRequest,
) -> braid::Result<braid::FitAnalysis> {
    let mut request = braid::FitRequest::new(spec.clone(), trajectory.clone())?;
    // The values per row and per level too, which the identity tests compare.
    request.predictions = true;
    braid::fit_panel(panel, &request)
}

/// A reference result from tests/reference (made by the scripts beside it).
pub fn reference_json(name: &str) -> serde_json::Value {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join(name);
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap()
}

/// A JSON document that braid wrote.
pub fn read_json(path: &Path) -> serde_json::Value {
    let text = std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap()
}

/// The process failed as bad input should: exit code 2, no panic, and one
/// line on stderr holding `expected`. Returns that line.
pub fn expect_one_line_error(out: &std::process::Output, expected: &str, what: &str) -> String {
    let stderr = String::from_utf8_lossy(&out.stderr).to_string();
    assert_eq!(
        out.status.code(),
        Some(2),
        "{what}: exit {:?}, stderr {stderr}",
        out.status.code()
    );
    assert!(!stderr.contains("panicked"), "{what}: panic: {stderr}");
    assert_eq!(stderr.trim_end().lines().count(), 1, "{what}: not one line: {stderr}");
    assert!(stderr.contains(expected), "{what}: expected '{expected}' in: {stderr}");
    stderr
}

/// The roles of the dental data (Potthoff & Roy 1964) as flags.
pub const DENTAL_ROLES: [&str; 6] = ["--id", "Subject", "--age", "age", "--outcome", "distance"];

/// The central band of Binomial(n, 0.05) with at most 1% of its mass in
/// each tail, from the cdf of statrs 0.19.1: a test of nominal size 5%
/// rejects in fewer or more of `n` replicates with probability under 2%.
pub fn binomial_band(n: u64) -> (u64, u64) {
    use statrs::distribution::{Binomial, DiscreteCDF};
    let b = Binomial::new(0.05, n).unwrap();
    let lo = (0..=n).find(|&k| b.cdf(k) > 0.01).unwrap();
    let hi = (0..=n).find(|&k| b.cdf(k) >= 0.99).unwrap();
    (lo, hi)
}
