//! Time each stage of the fit pipeline in-process on one file.
//!
//! ```text
//! cargo run --release --example stages -- FILE [--cluster COLUMN]
//! ```
//! The file needs columns pupil, age and score (as written by examples/bench.rs).

use std::path::PathBuf;
use std::time::Instant;

use braid::data::{self, ReadOptions, Roles};
use braid::infer::TrajectoryRequest;
use braid::lmm::{self, FitOptions};
use braid::spec::{self, ModelSpec};

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let file = PathBuf::from(args.get(1).expect("FILE"));
    let cluster = args.iter().position(|a| a == "--cluster").map(|i| args[i + 1].clone());
    let roles = Roles {
        id: "pupil".into(),
        age: "age".into(),
        outcome: "score".into(),
        cluster,
        ..Default::default()
    };
    let t = Instant::now();
    let panel = data::load(&file, &roles, ReadOptions::default()).unwrap();
    let t_load = t.elapsed();
    let model = ModelSpec {
        center: Some(16.0),
        ..Default::default()
    };
    let t = Instant::now();
    let frame = spec::build_frame(&panel, &model).unwrap();
    let t_frame = t.elapsed();
    let t = Instant::now();
    let cp = lmm::crossprod::CrossProducts::new(&frame.problem);
    let t_cross = t.elapsed();
    let theta: Vec<f64> = vec![0.3; frame.problem.n_theta()];
    let t = Instant::now();
    let reps: u32 = std::env::var("BRAID_REPS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(20);
    for _ in 0..reps {
        std::hint::black_box(lmm::criterion::deviance(&cp, &theta, lmm::Method::Reml));
    }
    let t_eval = t.elapsed() / reps;
    let t = Instant::now();
    for _ in 0..reps {
        std::hint::black_box(lmm::criterion::deviance_gradient(&cp, &theta, lmm::Method::Reml));
    }
    println!("one evaluation with gradient {:?}", t.elapsed() / reps);
    let t = Instant::now();
    let fit = lmm::fit(&frame.problem, FitOptions::default()).unwrap();
    let t_fit = t.elapsed();
    let t = Instant::now();
    let traj = braid::infer::trajectory(&fit, &frame, &TrajectoryRequest::default());
    let t_traj = t.elapsed();
    let t = Instant::now();
    let report = braid::report::FitReport::new(&panel, &frame, &fit, traj.clone());
    let t_report = t.elapsed();
    let t = Instant::now();
    let json = serde_json::to_string_pretty(&report).unwrap();
    let t_json = t.elapsed();
    println!("report {t_report:?}, JSON {t_json:?} ({} bytes)", json.len());
    println!("rows {}, participants {}", panel.n(), panel.id().n_levels());
    println!(
        "load {:?}, frame {:?}, cross-products {:?}, one evaluation {:?}",
        t_load, t_frame, t_cross, t_eval
    );
    println!(
        "fit {:?} ({} iterations, {} evaluations), trajectory {:?} ({} points)",
        t_fit,
        fit.info.iterations,
        fit.info.evaluations,
        t_traj,
        traj.points.len()
    );
}
