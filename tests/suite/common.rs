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
/// validated request.
pub fn fit(
    panel: &Panel,
    spec: &braid::spec::ModelSpec,
    trajectory: &braid::infer::TrajectoryRequest,
) -> braid::Result<braid::FitAnalysis> {
    let request = braid::FitRequest::new(spec.clone(), trajectory.clone())?;
    braid::fit_panel(panel, &request)
}
