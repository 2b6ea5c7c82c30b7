//! Benchmarks of whole `braid fit` runs, side by side with a reference.
//!
//! ```text
//! cargo build --release
//! cargo run --release --example bench -- [small|medium|large|huge|inspect|converge|apc|anova|score|plan|report|all] [WORK_DIR]
//! ```
//!
//! - `small`: a 3,000-participant three-wave file; REML, quadratic age,
//!   random intercept and slope per participant. braid's whole CLI run with
//!   JSON output (process start, CSV read, fit, inference, JSON) is timed,
//!   and so is the run that writes every output (CSV and figures too). In the
//!   same run, statsmodels MixedLM fits the same model and file with each of
//!   its optimizers (examples/bench_mixedlm.py); the ratio uses the fastest
//!   optimizer that reports convergence and reaches the best log-likelihood
//!   within 1e-3.
//! - `medium` (not in `all`): the same comparison on 30,000 participants
//!   (90,000 rows), with statsmodels' L-BFGS and BFGS only.
//! - `large`: about 1,000,000 rows (333,335 participants in 50 schools), the
//!   same model plus a school intercept; wall time and peak memory of the
//!   whole CLI run with every output.
//! - `huge` (not in `all`): the same model on 11,000,010 rows (3,666,670
//!   participants in 50 schools, a 0.5 GB file written once); wall time and
//!   peak memory of one run.
//! - `inspect`: `braid inspect` with JSON output on the same 1,000,000-row file.
//! - `converge`: `braid converge` on a 30,000-participant file (the demo's
//!   five cohorts, four waves with its dropout), without and with the school
//!   term (with it, M3 is one grouped fit instead of per-cohort fits).
//! - `apc`: `braid apc` on an invented repeated cross-section of 1,000,000
//!   records (the exact-value model; and with `--width 5` the factor model
//!   beside it, both by least squares), and `--hierarchical`
//!   (crossed random period and cohort intercepts) on 30,000 records.
//!
//! - `score`: `braid score` writing scores.csv and the reliability per wave,
//!   cohort and cohort × wave, on 1,000,000 rows × 20 items.
//! - `anova`: `braid anova` with JSON output on 100,000 participants × 4
//!   waves (complete; the demo's five cohorts).
//! - `report`: `braid report` on the demo's study file (three runs) and on
//!   the 1,000,000-row file with its period column (one run; written by
//!   `large` or `inspect` when absent), with every analysis it runs.
//! - `plan`: `braid plan` simulating 1,000 replicates of the demo's design
//!   (1,200 participants in 24 schools, the real fit and the convergence
//!   test with and without the offset in each), and the expected-information
//!   route searching n for 100 candidate designs.
//!
//! Peak memory (large) is read with GNU time (`time -f %M`, found on PATH);
//! the small runs spawn braid directly, so their wall time is braid's alone. Figures
//! are recorded in notes/benchmarks.md.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use braid::simulate::{Design, simulate};

fn design(per_cohort: usize, schools: usize, seed: u64) -> Design {
    let mut d = Design::demo();
    d.per_cohort = per_cohort;
    d.waves = 3;
    d.schools = schools;
    d.dropout = 0.0;
    d.skip = 0.0;
    d.seed = seed;
    if schools <= 1 {
        d.truth.sd_school = 0.0;
    }
    d
}

fn write(design: &Design, path: &Path) -> usize {
    let sim = simulate(design);
    let (h, rows) = sim.table();
    braid::data::read::write_csv(path, &h, &rows).expect("write benchmark file");
    rows.len()
}

fn braid_bin() -> PathBuf {
    let exe = std::env::current_exe().expect("current exe");
    // target/release/examples/bench -> target/release/braid
    exe.parent()
        .and_then(Path::parent)
        .map(|p| p.join("braid"))
        .expect("target folder")
}

/// Run `braid fit`; returns (wall seconds, peak RSS in MB, loglik). With
/// `memory` it runs under GNU time for the peak RSS (which adds the wrapper's
/// own start-up to the wall time, a few ms); otherwise braid is spawned
/// directly and the RSS is NaN. With `json_only` the run writes
/// `out/fit.json` through `--json`; otherwise it writes every output
/// (`--out`: JSON, CSV, PNG and SVG).
fn time_braid(file: &Path, out: &Path, school: bool, json_only: bool, memory: bool) -> (f64, f64, f64) {
    std::fs::create_dir_all(out).expect("output folder");
    let mut cmd = if memory {
        let mut c = Command::new("time");
        c.args(["-f", "%e %M"]).arg(braid_bin());
        c
    } else {
        Command::new(braid_bin())
    };
    cmd.arg("fit").arg(file);
    cmd.args(&PANEL_ROLES[..6])
        .args(["--center", "16", "--quiet", "--force"]);
    if json_only {
        cmd.arg("--json").arg(out.join("fit.json"));
    } else {
        cmd.arg("--out").arg(out);
    }
    if school {
        cmd.args(["--cluster", "school"]);
    }
    let t0 = Instant::now();
    let o = cmd.output().expect("run braid");
    let wall = t0.elapsed().as_secs_f64();
    assert!(
        o.status.success(),
        "braid failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    let stderr = String::from_utf8_lossy(&o.stderr);
    let last = stderr.lines().last().unwrap_or("");
    let rss_kb: f64 = if memory {
        last.split_whitespace()
            .nth(1)
            .and_then(|v| v.parse().ok())
            .unwrap_or(f64::NAN)
    } else {
        f64::NAN
    };
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("fit.json")).unwrap()).unwrap();
    (wall, rss_kb / 1024.0, json["loglik"].as_f64().unwrap())
}

/// Wall times of three runs of the braid command that `setup` builds.
fn three_runs(what: &str, setup: impl Fn(&mut Command)) -> Vec<f64> {
    (0..3)
        .map(|_| {
            let mut cmd = Command::new(braid_bin());
            setup(&mut cmd);
            let t0 = Instant::now();
            let o = cmd.output().expect(what);
            let wall = t0.elapsed().as_secs_f64();
            assert!(o.status.success(), "{what}: {}", String::from_utf8_lossy(&o.stderr));
            wall
        })
        .collect()
}

/// The roles of the simulated panels.
const PANEL_ROLES: [&str; 8] = [
    "--id",
    "pupil",
    "--age",
    "age",
    "--outcome",
    "score",
    "--cohort",
    "cohort",
];

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn small(work: &Path) {
    versus_reference(work, 600, 3000, &[]);
}

/// The 30,000-participant comparison: statsmodels' L-BFGS and BFGS only
/// (the other optimizers take many minutes at this size, and L-BFGS was its
/// fastest converging one at every size measured).
fn medium(work: &Path) {
    versus_reference(work, 6000, 30_000, &["lbfgs", "bfgs"]);
}

/// braid's whole `fit` run against statsmodels MixedLM's fastest converging
/// optimizer among `methods` (all five when empty) on a three-wave file of
/// five cohorts of `per_cohort` participants.
fn versus_reference(work: &Path, per_cohort: usize, seed: u64, methods: &[&str]) {
    let participants = 5 * per_cohort;
    let file = work.join(format!("bench_{participants}.csv"));
    let rows = write(&design(per_cohort, 1, seed), &file);
    // braid is timed before and after statsmodels (21 runs each), and
    // statsmodels' fastest converging optimizer is timed three times, so that
    // both medians come from the same stretch of this machine's load.
    let braid_runs = || -> Vec<(f64, f64, f64)> {
        (0..21)
            .map(|_| time_braid(&file, &work.join("out_small"), false, true, false))
            .collect()
    };
    let mut runs = braid_runs();
    let braid_ll = runs[0].2;
    let full: Vec<f64> = (0..5)
        .map(|_| time_braid(&file, &work.join("out_small_all"), false, false, false).0)
        .collect();
    println!("{participants} participants, {rows} rows");
    println!(
        "  braid fit --out, with CSV and figures (median of 5): {:.3} s",
        median(full)
    );
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("examples/bench_mixedlm.py");
    let reference = |methods: &[&str]| -> Option<serde_json::Value> {
        let o = Command::new("python3")
            .arg(&script)
            .arg(&file)
            .arg("16")
            .args(methods)
            .output()
            .expect("run python3");
        if !o.status.success() {
            println!("  statsmodels reference failed: {}", String::from_utf8_lossy(&o.stderr));
            return None;
        }
        Some(serde_json::from_slice(&o.stdout).unwrap())
    };
    let Some(r) = reference(methods) else { return };
    println!(
        "  statsmodels {} (numpy {}):",
        r["statsmodels"].as_str().unwrap_or("?"),
        r["numpy"].as_str().unwrap_or("?")
    );
    let fits = r["fits"].as_array().unwrap();
    let best = fits
        .iter()
        .filter_map(|f| f["loglik"].as_f64())
        .fold(f64::NEG_INFINITY, f64::max);
    let mut fastest: Option<(String, f64, f64)> = None;
    for f in fits {
        let method = f["method"].as_str().unwrap_or("?").to_string();
        let secs = f["seconds"].as_f64().unwrap_or(f64::NAN);
        match f["loglik"].as_f64() {
            Some(ll) => {
                let conv = f["converged"].as_bool().unwrap_or(false);
                let at_opt = (ll - best).abs() < 1e-3;
                println!("    {method:>7}: {secs:8.2} s, loglik {ll:.6}, converged {conv}, at best optimum {at_opt}");
                if conv && at_opt && fastest.as_ref().is_none_or(|b| secs < b.1) {
                    fastest = Some((method, secs, ll));
                }
            }
            None => println!("    {method:>7}: failed ({})", f["error"].as_str().unwrap_or("?")),
        }
    }
    let Some((m, first, ll)) = fastest else {
        println!("  no statsmodels optimizer converged to the best optimum");
        return;
    };
    let mut times = vec![first];
    if let Some(again) = reference(&[m.as_str(), m.as_str()]) {
        times.extend(
            again["fits"]
                .as_array()
                .unwrap()
                .iter()
                .filter_map(|f| f["seconds"].as_f64()),
        );
    }
    runs.extend(braid_runs());
    let braid_s = median(runs.iter().map(|r| r.0).collect());
    println!(
        "  braid fit --json (whole run, median of 42: 21 before and 21 after statsmodels): {braid_s:.4} s, REML loglik {braid_ll:.6}"
    );
    let shown: Vec<String> = times.iter().map(|t| format!("{t:.2}")).collect();
    let sm = median(times.clone());
    println!(
        "  ratio: statsmodels {m} median of [{}] s = {sm:.2} s / braid {braid_s:.4} s = {:.0}x; loglik difference braid − statsmodels = {:.2e}",
        shown.join(", "),
        sm / braid_s,
        braid_ll - ll
    );
}

fn large(work: &Path) {
    let file = work.join("bench_1m.csv");
    let t0 = Instant::now();
    let rows = write(&design(66_667, 50, 1_000_000), &file);
    println!(
        "large: 333,335 participants in 50 schools, {rows} rows (written in {:.1} s)",
        t0.elapsed().as_secs_f64()
    );
    let runs: Vec<(f64, f64, f64)> = (0..3)
        .map(|_| time_braid(&file, &work.join("out_large"), true, false, true))
        .collect();
    for (i, r) in runs.iter().enumerate() {
        println!(
            "  run {}: {:.2} s wall, peak RSS {:.0} MB, REML loglik {:.4}",
            i + 1,
            r.0,
            r.1,
            r.2
        );
    }
    println!("  median wall {:.2} s", median(runs.iter().map(|r| r.0).collect()));
}

/// Time `braid fit` with a school term on an 11,000,010-row file (3,666,670
/// participants in 50 schools; written when absent, about 0.5 GB): wall
/// time and peak memory of one run.
fn huge(work: &Path) {
    let file = work.join("bench_11m.csv");
    if !file.exists() {
        let t0 = Instant::now();
        let rows = write(&design(733_334, 50, 11_000_000), &file);
        println!("huge: {rows} rows written in {:.1} s", t0.elapsed().as_secs_f64());
    }
    let (wall, rss, loglik) = time_braid(&file, &work.join("out_huge"), true, false, true);
    println!(
        "huge: 11,000,010 rows with a school term: {wall:.2} s wall, peak RSS {rss:.0} MB, REML loglik {loglik:.4}"
    );
}

/// Time `braid inspect` on the 1,000,000-row file (written by `large` when absent).
fn inspect(work: &Path) {
    let file = work.join("bench_1m.csv");
    if !file.exists() {
        write(&design(66_667, 50, 1_000_000), &file);
    }
    let mut walls = Vec::new();
    for _ in 0..3 {
        let t0 = Instant::now();
        let o = Command::new(braid_bin())
            .arg("inspect")
            .arg(&file)
            .args(PANEL_ROLES)
            .args(["--wave", "wave"])
            .args(["--quiet", "--force", "--json"])
            .arg(work.join("design.json"))
            .output()
            .expect("run braid inspect");
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        walls.push(t0.elapsed().as_secs_f64());
    }
    println!(
        "inspect: 1,000,005 rows, runs {walls:.2?} s, median {:.2} s",
        median(walls.clone())
    );
}

/// An invented repeated cross-section: exact ages 20–69, assessment years
/// 2000–2029, crossed period and cohort effects in 5-year groups.
fn write_cross_section(path: &Path, n: usize, seed: u64) {
    use std::io::Write;
    let mut rng = braid::simulate::Rng::new(seed);
    let period: Vec<f64> = (0..6).map(|_| 1.5 * rng.normal()).collect();
    let cohort: Vec<f64> = (0..16).map(|_| 2.0 * rng.normal()).collect();
    let mut w = std::io::BufWriter::new(std::fs::File::create(path).expect("create"));
    writeln!(w, "age,year,score").expect("write");
    for _ in 0..n {
        let age = 20.0 + 49.999 * rng.uniform();
        let year = 2000.0 + 29.999 * rng.uniform();
        let (i, j) = (((age - 20.0) / 5.0) as usize, ((year - 2000.0) / 5.0) as usize);
        let c = age - 45.0;
        let y = 30.0 + 0.2 * c - 0.004 * c * c + period[j] + cohort[9 - i + j] + 3.0 * rng.normal();
        writeln!(w, "{age:.3},{year:.3},{y:.4}").expect("write");
    }
}

/// Wall time of one `braid apc` run on a records file.
fn time_apc(file: &Path, width: Option<&str>, hierarchical: bool, json: &Path) -> f64 {
    let mut cmd = Command::new(braid_bin());
    cmd.arg("apc").arg(file);
    cmd.args(["--age", "age", "--period", "year", "--outcome", "score"]);
    if let Some(w) = width {
        cmd.args(["--width", w]);
    }
    cmd.args(["--quiet", "--force", "--json"]).arg(json);
    if hierarchical {
        cmd.arg("--hierarchical");
    }
    let t0 = Instant::now();
    let o = cmd.output().expect("run braid apc");
    let wall = t0.elapsed().as_secs_f64();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    wall
}

fn apc(work: &Path) {
    let big = work.join("apc_1m.csv");
    if !big.exists() {
        write_cross_section(&big, 1_000_000, 1983);
    }
    for (width, what) in [
        (None, "exact-value model"),
        (Some("5"), "--width 5 (factor and exact models)"),
    ] {
        let walls: Vec<f64> = (0..3)
            .map(|_| time_apc(&big, width, false, &work.join("apc_1m.json")))
            .collect();
        println!(
            "apc {what}: 1,000,000 records, runs {walls:.2?} s, median {:.2} s",
            median(walls.clone())
        );
    }
    let small = work.join("apc_30k.csv");
    if !small.exists() {
        write_cross_section(&small, 30_000, 2006);
    }
    let walls: Vec<f64> = (0..5)
        .map(|_| time_apc(&small, Some("5"), true, &work.join("apc_30k.json")))
        .collect();
    println!(
        "apc --hierarchical: 30,000 records, runs {walls:.2?} s, median {:.2} s",
        median(walls.clone())
    );
}

/// `braid anova` on 100,000 participants × 4 waves (the demo's five cohorts,
/// no dropout and no missed wave), three runs.
fn anova(work: &Path) {
    let file = work.join("anova_100k.csv");
    let mut d = Design::demo();
    d.per_cohort = 20_000;
    d.seed = 100_000;
    d.dropout = 0.0;
    d.skip = 0.0;
    let rows = write(&d, &file);
    println!("anova: 100,000 participants × 4 waves, {rows} rows");
    let walls = three_runs("run braid anova", |cmd| {
        cmd.arg("anova").arg(&file).args(PANEL_ROLES).args(["--wave", "wave"]);
        cmd.args(["--quiet", "--force", "--json"]).arg(work.join("anova.json"));
    });
    println!("anova: runs {walls:.2?} s, median {:.2} s", median(walls.clone()));
}

/// `braid score` on 1,000,000 rows × 20 items (250,000 participants, four
/// waves, two cohorts, about 1% blank responses), three runs.
fn score(work: &Path) {
    let file = work.join("score_1m.csv");
    if !file.exists() {
        let mut rng = braid::simulate::Rng::new(2027);
        let mut s = String::from("pupil,cohort,wave");
        for i in 1..=20 {
            s.push_str(&format!(",q{i}"));
        }
        s.push('\n');
        for p in 0..250_000 {
            let trait_ = rng.normal();
            for w in 1..=4 {
                s.push_str(&format!("P{p},C{},{w}", p % 2));
                for _ in 0..20 {
                    if rng.uniform() < 0.01 {
                        s.push(',');
                    } else {
                        let x = (2.0 + 0.8 * trait_ + 0.7 * rng.normal()).round().clamp(0.0, 4.0);
                        s.push_str(&format!(",{x}"));
                    }
                }
                s.push('\n');
            }
        }
        std::fs::write(&file, s).expect("write the item file");
    }
    let walls = three_runs("run braid score", |cmd| {
        cmd.arg("score").arg(&file);
        cmd.args([
            "--id", "pupil", "--wave", "wave", "--cohort", "cohort", "--items", "q1..q20",
        ]);
        cmd.args([
            "--reverse",
            "q3,q7",
            "--scale-min",
            "0",
            "--scale-max",
            "4",
            "--quiet",
            "--force",
            "--out",
        ]);
        cmd.arg(work.join("score_out"));
    });
    println!(
        "score: 1,000,000 rows × 20 items, runs {walls:.2?} s, median {:.2} s",
        median(walls.clone())
    );
}

/// `braid converge` on 30,000 participants, three runs each without and
/// with the school term.
fn converge(work: &Path) {
    let file = work.join("converge_30k.csv");
    let mut d = Design::demo();
    d.per_cohort = 6000;
    d.seed = 30_000;
    let rows = write(&d, &file);
    println!("converge: 30,000 participants in {} schools, {rows} rows", d.schools);
    for school in [false, true] {
        let json = work.join(if school {
            "converge_school.json"
        } else {
            "converge.json"
        });
        let walls = three_runs("run braid converge", |cmd| {
            cmd.arg("converge").arg(&file).args(PANEL_ROLES);
            cmd.args(["--wave", "wave", "--quiet", "--force", "--json"]).arg(&json);
            if school {
                cmd.args(["--cluster", "school"]);
            }
        });
        let out: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&json).unwrap()).unwrap();
        let m3 = out["tests"]
            .as_array()
            .and_then(|t| t.iter().find(|t| t["kind"] == "cohort_covariance"))
            .map(|t| {
                format!(
                    "M3 statistic {:.3} on {} df",
                    t["statistic"].as_f64().unwrap_or(f64::NAN),
                    t["df"]
                )
            })
            .unwrap_or_else(|| "no M3".into());
        println!(
            "  {}: runs {walls:.2?} s, median {:.2} s; {m3}",
            if school {
                "with --cluster school"
            } else {
                "participants only"
            },
            median(walls.clone())
        );
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let which = args.get(1).map(String::as_str).unwrap_or("all");
    let work = args
        .get(2)
        .map(PathBuf::from)
        .unwrap_or_else(|| std::env::temp_dir().join("braid-bench"));
    std::fs::create_dir_all(&work).expect("work folder");
    if which == "small" || which == "all" {
        small(&work);
    }
    // Not part of "all": statsmodels takes minutes at this size.
    if which == "medium" {
        medium(&work);
    }
    if which == "large" || which == "all" {
        large(&work);
    }
    // Not part of "all": the file takes a minute to write and half a gigabyte.
    if which == "huge" {
        huge(&work);
    }
    if which == "inspect" || which == "all" {
        inspect(&work);
    }
    if which == "converge" || which == "all" {
        converge(&work);
    }
    if which == "score" || which == "all" {
        score(&work);
    }
    if which == "anova" || which == "all" {
        anova(&work);
    }
    if which == "apc" || which == "all" {
        apc(&work);
    }
    if which == "plan" || which == "all" {
        plan(&work);
    }
    if which == "report" || which == "all" {
        report(&work);
    }
}

fn report(work: &Path) {
    let demo = work.join("report-demo");
    let o = Command::new(braid_bin())
        .args(["demo", "--quiet", "--force", "--out"])
        .arg(&demo)
        .output()
        .expect("braid demo");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let walls = three_runs("braid report (demo)", |cmd| {
        cmd.args(["report", "--quiet", "--force", "--study"])
            .arg(demo.join("study.toml"))
            .arg("--out")
            .arg(work.join("report-demo-out"));
    });
    println!("report: the demo's study, every analysis and the page: runs {walls:.2?} s");
    let file = work.join("bench_1m.csv");
    if !file.exists() {
        write(&design(66_667, 50, 1_000_000), &file);
    }
    let t0 = Instant::now();
    let o = Command::new(braid_bin())
        .arg("report")
        .arg(&file)
        .args(PANEL_ROLES)
        .args([
            "--wave",
            "wave",
            "--cluster",
            "school",
            "--period",
            "year",
            "--quiet",
            "--force",
            "--out",
        ])
        .arg(work.join("report-1m-out"))
        .output()
        .expect("braid report");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    println!(
        "report: 1,000,005 rows with schools and period: {:.1} s",
        t0.elapsed().as_secs_f64()
    );
}

/// The demo's population in a plan file.
const DEMO_POPULATION: &str = "
[population]
center = 16
mean = [50, 1.6, -0.12]
sd_intercept = 5
sd_slope = 0.6
correlation = 0.3
sd_cluster = 2
sd_residual = 3
";

fn plan(work: &Path) {
    let offset = 0.3 * 34f64.sqrt();
    let demo = format!(
        "[[design]]\nname = \"demo\"\nentry_ages = [12, 14, 16, 18, 20]\nwaves = 4\ninterval = 1\nper_cohort = 240\n\
         dropout = 0.08\nmissed = 0.05\nclusters = 24\n{DEMO_POPULATION}\n[targets]\nconvergence = {{ offset = {offset}, power = 0.8 }}\n\
         age_term = {{ power = 0.9 }}\nhalf_width = {{ ages = [13, 19], at_most = 1 }}\n\
         [simulation]\nreplicates = 1000\nprecision = 0\nseed = 1\n"
    );
    let file = work.join("plan-demo.toml");
    std::fs::write(&file, demo).expect("plan file");
    let json = work.join("plan-demo.json");
    let t0 = Instant::now();
    let o = Command::new(braid_bin())
        .arg("plan")
        .arg(&file)
        .args(["--quiet", "--force", "--json"])
        .arg(&json)
        .output()
        .expect("braid plan");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    println!(
        "plan: 1,000 replicates of the demo design (1,200 participants, 24 schools; fit + 2 convergence tests each): {:.1} s",
        t0.elapsed().as_secs_f64()
    );
    let mut many = String::new();
    for k in 0..100 {
        let cohorts = 3 + k % 4;
        let waves = 3 + (k / 4) % 4;
        let spacing = 1.0 + ((k / 16) % 3) as f64 * 0.5;
        many.push_str(&format!(
            "[[design]]\nname = \"d{k}\"\ncohorts = {cohorts}\nfirst_age = 12\nspacing = {spacing}\nwaves = {waves}\n\
             interval = 1\ndropout = 0.1\nmissed = 0.05\nclusters = 24\n\n"
        ));
    }
    many.push_str(DEMO_POPULATION);
    many.push_str(
        "\n[costs]\nper_participant = 60\nper_assessment = 30\nper_year = 10000\n\
         [targets]\nconvergence = { offset = 1.5, power = 0.8 }\nage_term = { power = 0.9 }\n\
         half_width = { ages = [13, 16], at_most = 1 }\n[simulation]\nroute = \"information\"\n",
    );
    let file = work.join("plan-100.toml");
    std::fs::write(&file, many).expect("plan file");
    let walls = three_runs("braid plan (information)", |cmd| {
        cmd.arg("plan").arg(&file).arg("--quiet");
    });
    println!(
        "plan: expected information for 100 candidate designs, n searched by bisection: {:.3} s (three runs: {walls:.3?})",
        walls.iter().copied().fold(f64::INFINITY, f64::min)
    );
}
