//! What a user sees: the demo and `braid fit` outputs, and a one-line error
//! with exit code 2 (never a panic) for each malformed input in
//! tests/data/bad/ (listed with its expected message in expected.tsv).

use std::fs;

use crate::common::{braid, data_dir, expect_keys, expect_one_line_error, expect_words, read_json, run_ok, temp_dir};

const BASE: [&str; 6] = ["--id", "pupil", "--age", "age", "--outcome", "score"];

/// `braid COMMAND tests/data/FILE` with the pupil, age and score roles.
pub(crate) fn on_test_file(command: &str, file: &str) -> std::process::Command {
    let mut cmd = braid();
    cmd.arg(command).arg(data_dir().join(file)).args(BASE);
    cmd
}

#[test]
fn every_malformed_input_gets_a_one_line_error_and_exit_code_2() {
    let bad = data_dir().join("bad");
    let manifest = fs::read_to_string(bad.join("expected.tsv")).unwrap();
    let mut checked = 0;
    for line in manifest.lines().filter(|l| !l.starts_with('#') && !l.trim().is_empty()) {
        let cols: Vec<&str> = line.split('\t').collect();
        let (file, extra, expected) = (cols[0], cols[1], cols[2]);
        let mut cmd = braid();
        // "apc!..." runs `braid apc` with only the listed flags, "inspect|..."
        // (or converge, anova) runs that command with the base roles and the
        // listed flags; otherwise `braid fit`.
        let (command, extra) = ["apc", "inspect", "converge", "anova", "score"]
            .iter()
            .find_map(|c| extra.strip_prefix(c).map(|rest| (*c, rest.trim_start_matches('|'))))
            .unwrap_or(("fit", extra));
        cmd.arg(command);
        let path = bad.join(file);
        if file.ends_with(".toml") {
            cmd.arg("--study").arg(&path);
        } else {
            cmd.arg(&path);
            if !extra.starts_with('!') {
                cmd.args(BASE);
            }
        }
        let extra = extra.trim_start_matches('!');
        if !extra.is_empty() {
            cmd.args(extra.split('|'));
        }
        let before = fs::read(&path).ok();
        let out = cmd.output().unwrap();
        expect_one_line_error(&out, expected, file);
        assert_eq!(before, fs::read(&path).ok(), "{file} was modified");
        checked += 1;
    }
    assert!(checked >= 15, "only {checked} malformed inputs checked");
}

#[test]
fn fit_writes_json_with_stable_keys_csv_and_figures() {
    let dir = temp_dir("fit-out");
    let out = run_ok(
        on_test_file("fit", "sim_school.csv")
            .args(["--cluster", "school", "--cohort", "cohort", "--wave", "wave", "--out"])
            .arg(&dir),
    );
    expect_words(
        &out,
        &[
            "Fixed effects",
            "Random effects",
            "REML log-likelihood",
            "Satterthwaite",
            "Cautions",
        ],
        "summary",
    );
    let json: serde_json::Value = read_json(&dir.join("fit.json"));
    expect_keys(
        &json,
        &[
            "method",
            "n_obs",
            "n_groups",
            "loglik",
            "aic",
            "bic",
            "fixed",
            "random",
            "residual_variance",
            "converged",
            "boundary",
            "trajectory",
        ],
        "fit.json",
    );
    assert_eq!(json["method"], "REML");
    expect_keys(&json["fixed"][0], &["term", "estimate", "se", "df", "t", "p"], "fixed");
    expect_keys(
        &json["random"][0],
        &["factor", "terms", "covariance", "sd", "correlation"],
        "random",
    );
    assert_eq!(json["n_groups"]["school"], 12);
    let csv = fs::read_to_string(dir.join("trajectory.csv")).unwrap();
    assert_eq!(
        csv.lines().next().unwrap(),
        "age,mean,lower,upper,rate,rate_lower,rate_upper"
    );
    assert_eq!(csv.lines().count(), 102);
    let png = fs::read(dir.join("trajectory.png")).unwrap();
    assert_eq!(&png[1..4], b"PNG");
    let svg = fs::read_to_string(dir.join("trajectory.svg")).unwrap();
    assert!(svg.contains("<svg") && svg.contains("age (years)"));
    // A second run gives byte-identical JSON (stable output).
    let dir2 = temp_dir("fit-out-2");
    let out2 = on_test_file("fit", "sim_school.csv")
        .args([
            "--cluster",
            "school",
            "--cohort",
            "cohort",
            "--wave",
            "wave",
            "--quiet",
            "--out",
        ])
        .arg(&dir2)
        .output()
        .unwrap();
    assert!(out2.status.success());
    assert!(out2.stdout.is_empty());
    assert_eq!(
        fs::read(dir.join("fit.json")).unwrap(),
        fs::read(dir2.join("fit.json")).unwrap()
    );
}

#[test]
fn demo_writes_its_panel_study_file_and_fit() {
    let dir = temp_dir("demo");
    let out = run_ok(braid().args(["demo", "--out"]).arg(&dir));
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        stdout.contains("truth"),
        "the demo prints the truth beside the estimates"
    );
    for f in [
        "panel.csv",
        "study.toml",
        "fit.json",
        "trajectory.csv",
        "trajectory.png",
        "trajectory.svg",
        "design.json",
        "lexis.png",
        "lexis.svg",
        "coverage.png",
        "coverage.svg",
    ] {
        assert!(dir.join(f).exists(), "demo did not write {f}");
    }
    // Its study file drives `braid inspect --study` too, into a new folder.
    let figures = dir.join("design");
    run_ok(
        braid()
            .args(["inspect", "--quiet", "--study"])
            .arg(dir.join("study.toml"))
            .arg("--out")
            .arg(&figures),
    );
    for f in ["design.json", "lexis.png", "lexis.svg", "coverage.png", "coverage.svg"] {
        assert!(
            figures.join(f).metadata().unwrap().len() > 1000,
            "inspect did not write {f}"
        );
    }
    let v: serde_json::Value = read_json(&figures.join("design.json"));
    assert_eq!(v["collinear"]["calendar_source"], "birth_from_period");
    assert_eq!(v["collinear"]["age_period_cohort"], true);
    // A second run into the same folder is refused without --force.
    let again = braid()
        .args(["inspect", "--quiet", "--study"])
        .arg(dir.join("study.toml"))
        .arg("--out")
        .arg(&figures)
        .output()
        .unwrap();
    expect_one_line_error(&again, "already exists and holds files", "inspect into a full folder");
    // The study file it wrote fits again through `braid fit --study`.
    run_ok(braid().args(["fit", "--quiet", "--study"]).arg(dir.join("study.toml")));
}

#[test]
fn parquet_twin_of_the_demo_panel_gives_the_same_fit() {
    let dir = temp_dir("parquet");
    run_ok(braid().args(["demo", "--quiet", "--out"]).arg(&dir));
    let roles = braid::simulate::Simulated::roles(true);
    let csv = braid::data::load(&dir.join("panel.csv"), &roles, Default::default()).unwrap();
    let pq = braid::data::load(&dir.join("panel.parquet"), &roles, Default::default()).unwrap();
    assert_eq!(csv.age(), pq.age());
    assert_eq!(csv.outcome(), pq.outcome());
    assert_eq!(csv.id(), pq.id());
    assert_eq!(csv.cohort(), pq.cohort());
    let spec = braid::spec::ModelSpec::default();
    let a = crate::common::fit(&csv, &spec, &braid::infer::TrajectoryRequest::grid(5)).unwrap();
    let b = crate::common::fit(&pq, &spec, &braid::infer::TrajectoryRequest::grid(5)).unwrap();
    assert_eq!(a.fit.loglik, b.fit.loglik);
}

#[test]
fn inspect_writes_the_design_report_with_stable_keys() {
    let dir = temp_dir("inspect");
    let json = dir.join("design.json");
    let out = run_ok(
        on_test_file("inspect", "sim_school.csv")
            .args(["--cohort", "cohort", "--wave", "wave", "--json"])
            .arg(&json),
    );
    expect_words(
        &out,
        &["Coverage", "Overlap of neighbours", "Retention", "Span"],
        "inspect summary",
    );
    let v: serde_json::Value = read_json(&json);
    expect_keys(
        &v["cohorts"][0],
        &["cohort", "n_participants", "waves", "age_min", "age_median", "age_max"],
        "cohorts",
    );
    expect_keys(
        &v["overlap"][0],
        &["cohort_a", "cohort_b", "age_from", "age_to", "n_a", "n_b", "linked"],
        "overlap",
    );
    expect_keys(&v["retention"][0], &["cohort", "wave", "n", "share"], "retention");
    expect_keys(&v["span"], &["age_from", "age_to", "calendar_years"], "span");
    assert_eq!(v["cohorts"].as_array().unwrap().len(), 5);
}

#[test]
fn an_output_folder_with_files_is_refused_unless_forced() {
    let dir = temp_dir("force");
    let run = |extra: &[&str]| {
        braid()
            .args(["fit", data_dir().join("dental.csv").to_str().unwrap()])
            .args(crate::common::DENTAL_ROLES)
            .args(["--degree", "1", "--quiet", "--out"])
            .arg(&dir)
            .args(extra)
            .output()
            .unwrap()
    };
    assert!(run(&[]).status.success(), "an empty folder is fine");
    let second = run(&[]);
    let stderr = expect_one_line_error(
        &second,
        "already exists and holds files",
        "a second run into one folder",
    );
    assert!(stderr.contains("--force"), "{stderr}");
    assert!(run(&["--force"]).status.success());
}

#[test]
fn a_read_only_input_is_read_and_left_unchanged() {
    use std::os::unix::fs::PermissionsExt;
    let dir = temp_dir("read-only");
    let input = dir.join("dental.csv");
    fs::copy(data_dir().join("dental.csv"), &input).unwrap();
    fs::set_permissions(&input, fs::Permissions::from_mode(0o444)).unwrap();
    let before = fs::read(&input).unwrap();
    run_ok(
        braid()
            .args(["fit", input.to_str().unwrap(), "--quiet"])
            .args(crate::common::DENTAL_ROLES)
            .arg("--json")
            .arg(dir.join("fit.json")),
    );
    assert_eq!(fs::read(&input).unwrap(), before);
    assert_eq!(fs::metadata(&input).unwrap().permissions().mode() & 0o777, 0o444);
    // Only the named output was written next to the input.
    let mut names: Vec<String> = fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .collect();
    names.sort();
    assert_eq!(names, ["dental.csv", "fit.json"]);
}

#[test]
fn a_wide_file_and_its_long_twin_give_identical_fits() {
    use std::collections::BTreeMap;
    let dir = temp_dir("wide");
    let sim = braid::simulate::simulate(&braid::simulate::Design::demo());
    let (header, rows) = sim.table();
    braid::data::read::write_csv(&dir.join("long.csv"), &header, &rows).unwrap();
    // The same records, one row per pupil: score_w and age_w for waves 1–4.
    // Per pupil: school, cohort, and (score, age) text at each wave.
    type WideRow = (String, String, Vec<(String, String)>);
    let mut wide: BTreeMap<String, WideRow> = BTreeMap::new();
    for r in &rows {
        let e =
            wide.entry(r[0].clone())
                .or_insert((r[1].clone(), r[2].clone(), vec![(String::new(), String::new()); 4]));
        let w: usize = r[3].parse().unwrap();
        e.2[w - 1] = (r[6].clone(), r[5].clone());
    }
    let mut text = String::from("pupil,school,cohort,score_1,score_2,score_3,score_4,age_1,age_2,age_3,age_4\n");
    for (id, (school, cohort, cells)) in &wide {
        let scores: Vec<&str> = cells.iter().map(|c| c.0.as_str()).collect();
        let ages: Vec<&str> = cells.iter().map(|c| c.1.as_str()).collect();
        text.push_str(&format!(
            "{id},{school},{cohort},{},{}\n",
            scores.join(","),
            ages.join(",")
        ));
    }
    fs::write(dir.join("wide.csv"), text).unwrap();
    let long_roles = braid::data::Roles {
        period: None,
        ..braid::simulate::Simulated::roles(true)
    };
    let wide_roles = braid::data::Roles {
        wave: None,
        period: None,
        wide_outcome: (1..=4).map(|w| format!("score_{w}")).collect(),
        wide_age: (1..=4).map(|w| format!("age_{w}")).collect(),
        ..long_roles.clone()
    };
    let long = braid::data::load(&dir.join("long.csv"), &long_roles, Default::default()).unwrap();
    let wide = braid::data::load(&dir.join("wide.csv"), &wide_roles, Default::default()).unwrap();
    assert_eq!(
        wide.dropped().missing_outcome,
        4 * wide.id().n_levels() - long.n(),
        "missed waves are counted as dropped rows"
    );
    assert_eq!(long.age(), wide.age());
    assert_eq!(long.outcome(), wide.outcome());
    let spec = braid::spec::ModelSpec::default();
    let grid = braid::infer::TrajectoryRequest::grid(5);
    let a = crate::common::fit(&long, &spec, &grid).unwrap();
    let b = crate::common::fit(&wide, &spec, &grid).unwrap();
    // The tolerance is 1e-10; the rows arrive in the same order, so
    // the fits agree exactly.
    assert!(
        (a.fit.loglik - b.fit.loglik).abs() < 1e-10,
        "{} vs {}",
        a.fit.loglik,
        b.fit.loglik
    );
    // Through the command line too.
    run_ok(
        braid()
            .args([
                "fit",
                dir.join("wide.csv").to_str().unwrap(),
                "--id",
                "pupil",
                "--cluster",
                "school",
                "--quiet",
            ])
            .args([
                "--wide-outcome",
                "score_1,score_2,score_3,score_4",
                "--wide-age",
                "age_1,age_2,age_3,age_4",
                "--outcome",
                "score",
            ])
            .arg("--json")
            .arg(dir.join("wide.json")),
    );
}

#[test]
fn converge_writes_tests_shared_ages_verdict_and_figure() {
    let dir = temp_dir("converge");
    let out = run_ok(
        on_test_file("converge", "sim_plain.csv")
            .args(["--cohort", "cohort", "--margin", "1.5", "--out"])
            .arg(&dir),
    );
    expect_words(
        &out,
        &["Models", "Tests", "Shared ages", "Verdict", "Assumes"],
        "converge summary",
    );
    let v: serde_json::Value = read_json(&dir.join("converge.json"));
    expect_keys(&v["tests"][0], &["name", "statistic", "df", "p", "method"], "tests");
    expect_keys(
        &v["shared_ages"][0],
        &[
            "cohort_a",
            "cohort_b",
            "age",
            "difference",
            "lower",
            "upper",
            "equivalent",
        ],
        "shared_ages",
    );
    assert!(v["verdict"].as_str().unwrap().contains("converge"));
    assert!(v["assumptions"].as_array().unwrap().len() >= 3);
    assert_eq!(v["margin"], 1.5);
    for f in ["shared_ages.png", "shared_ages.svg"] {
        assert!(
            dir.join(f).metadata().unwrap().len() > 1000,
            "converge did not write {f}"
        );
    }
    // One cohort only is refused with a one-line error.
    let one = braid()
        .args([
            "converge",
            data_dir().join("bad").join("good_small.csv").to_str().unwrap(),
        ])
        .args(BASE)
        .args(["--cohort-from", "first-age", "--cohort-width", "100"])
        .output()
        .unwrap();
    expect_one_line_error(&one, "one cohort only", "converge with one cohort");
}

/// `braid apc` on Holford's table of counts, with further flags.
fn holford_apc(extra: &[&str]) -> std::process::Output {
    let table = data_dir().join("holford_prostate.csv");
    let roles = [
        "--age",
        "age",
        "--period",
        "period",
        "--events",
        "deaths",
        "--exposure",
        "population",
    ];
    braid().arg("apc").arg(table).args(roles).args(extra).output().unwrap()
}

#[test]
fn apc_writes_the_identification_report_with_stable_keys() {
    let dir = temp_dir("apc");
    let json = dir.join("apc.json");
    let json_arg = json.to_str().unwrap();
    let out = holford_apc(&["--assume", "period-slope>=0", "--json", json_arg]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    expect_words(
        &out,
        &["Deviance", "Identified", "Solutions", "Bounds", "Assumes"],
        "apc summary",
    );
    let v: serde_json::Value = read_json(&json);
    assert_eq!(v["rank_deficiency"], 1);
    expect_keys(
        &v,
        &[
            "null_vector",
            "deviance_table",
            "identified",
            "solutions",
            "bounds",
            "assumptions",
        ],
        "apc JSON",
    );
    for key in ["term", "value"] {
        assert!(v["null_vector"][0].get(key).is_some());
    }
    for key in ["model", "deviance", "df"] {
        assert!(v["deviance_table"][0].get(key).is_some());
    }
    for key in ["quantity", "estimate", "se"] {
        assert!(v["identified"][0].get(key).is_some());
    }
    for key in ["constraint", "t", "effects"] {
        assert!(v["solutions"][0].get(key).is_some());
    }
    // A constraint that is not one is a one-line error with exit code 2.
    let bad = holford_apc(&["--constraint", "equal:age:1"]);
    expect_one_line_error(&bad, "--constraint", "apc with a constraint that is not one");
}

#[test]
fn apc_checks_a_given_birth_year_column_and_fits_the_hierarchical_model() {
    let dir = temp_dir("apc-cohort");
    // The invented cross-section with a whole-year birth year column.
    let text = fs::read_to_string(data_dir().join("hapc_cross_section.csv")).unwrap();
    let mut out = String::from("age,year,score,born\n");
    for line in text.lines().skip(1) {
        let f: Vec<f64> = line.split(',').map(|x| x.parse().unwrap()).collect();
        out.push_str(&format!("{},{},{},{}\n", f[0], f[1], f[2], (f[1] - f[0]).floor()));
    }
    let file = dir.join("births.csv");
    fs::write(&file, out).unwrap();
    let json = dir.join("apc.json");
    let run = |cohort: &str, json: &std::path::Path| {
        braid()
            .arg("apc")
            .arg(&file)
            .args(["--age", "age", "--period", "year", "--outcome", "score", "--width", "5"])
            .args(["--birth-year", cohort, "--hierarchical", "--quiet", "--json"])
            .arg(json)
            .output()
            .unwrap()
    };
    let ok = run("born", &json);
    assert!(ok.status.success(), "{}", String::from_utf8_lossy(&ok.stderr));
    let v: serde_json::Value = read_json(&json);
    assert!(v["cohort_check"]["max_gap"].as_f64().unwrap() <= 1.0);
    assert!(
        v["hierarchical"]["caution"]
            .as_str()
            .unwrap()
            .contains("hidden constraint")
    );
    // A column that is not a birth year is refused, naming a row.
    let bad = run("score", &dir.join("other.json"));
    let err = expect_one_line_error(
        &bad,
        "is not a birth year",
        "apc with a column that is not a birth year",
    );
    assert!(err.contains("data row"), "{err}");
}

// With a school term crossing cohorts, M3 is the grouped fit: its test, the
// route in the notes, and one variance row per cohort are in the JSON.
#[test]
fn converge_with_a_school_term_fits_m3_and_reports_each_cohorts_variances() {
    let dir = temp_dir("converge_school");
    let json = dir.join("c.json");
    run_ok(
        on_test_file("converge", "sim_school.csv")
            .args(["--cohort", "cohort", "--cluster", "school", "--quiet", "--json"])
            .arg(&json),
    );
    let v: serde_json::Value = read_json(&json);
    let n_cohorts = v["cohorts"].as_array().unwrap().len();
    let m3 = v["tests"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| t["name"].as_str().unwrap().starts_with("M3"))
        .expect("an M3 test");
    // df = (cohorts − 1) × (3 covariance parameters + 1 residual variance).
    assert_eq!(m3["df"].as_f64().unwrap(), ((n_cohorts - 1) * 4) as f64);
    // The test file's cohorts are small, so the p-value is withheld (its χ²
    // reference is conservative there) with the reason, and the statistic kept.
    assert!(m3["p"].is_null(), "{m3}");
    assert!(m3["withheld"].as_str().unwrap().contains("conservative"), "{m3}");
    assert!(m3["statistic"].as_f64().unwrap() >= 0.0);
    let rows = v["cohort_variances"].as_array().unwrap();
    assert_eq!(rows.len(), n_cohorts);
    for r in rows {
        assert!(r["residual_sd"].as_f64().unwrap() > 0.0);
        assert_eq!(r["sd"].as_array().unwrap().len(), 2);
    }
    let notes = v["notes"].as_array().unwrap();
    assert!(
        notes
            .iter()
            .any(|n| n.as_str().unwrap().contains("residual variance per cohort")),
        "{notes:?}"
    );
}

#[test]
fn completions_name_every_command_and_complete_files_for_data() {
    // The zsh script (clap_complete's generator) lists each subcommand and
    // completes the data argument and --out as paths.
    let out = run_ok(braid().args(["completions", "zsh"]));
    expect_words(
        &out,
        &["fit", "demo", "inspect", "converge", "apc", "_files -/", "_files"],
        "zsh completion script",
    );
    let bad = braid().args(["completions", "teletype"]).output().unwrap();
    assert_eq!(bad.status.code(), Some(2), "an unknown shell is a usage error");
}
