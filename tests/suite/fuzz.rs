//! Property test of intake: seeded random CSV files, Parquet files (some
//! with corrupted bytes) and study files never make braid panic; every one
//! either loads or returns an error value, and loaded panels go through the
//! fit and the design report. The CI
//! run uses `BRAID_FUZZ_CASES` inputs (default 2,000); the full run of
//! 100,000 is recorded in notes/decisions.md with its command.

use std::panic::{AssertUnwindSafe, catch_unwind};

use braid::data::{self, ReadOptions, Roles};
use braid::simulate::Rng;

use crate::common::temp_dir;

fn pick<'a>(rng: &mut Rng, items: &[&'a str]) -> &'a str {
    items[(rng.uniform() * items.len() as f64) as usize % items.len()]
}

fn cell(rng: &mut Rng) -> String {
    let u = rng.uniform();
    if u < 0.45 {
        format!("{:.3}", 5.0 + 20.0 * rng.uniform())
    } else if u < 0.55 {
        pick(
            rng,
            &[
                "", "NA", ".", "NaN", "inf", "-inf", "1e400", "-0", "0x1F", "1,5", "  7 ", "\"3\"",
            ],
        )
        .to_string()
    } else if u < 0.7 {
        format!("P{}", (rng.uniform() * 6.0) as u32)
    } else if u < 0.8 {
        pick(
            rng,
            &[
                "2020-02-29",
                "2021-02-29",
                "1999-12-31",
                "2020-13-01",
                "x",
                "é",
                "\"a,b\"",
                "\"unterminated",
            ],
        )
        .to_string()
    } else if u < 0.9 {
        "9".repeat((rng.uniform() * 40.0) as usize)
    } else {
        let n = (rng.uniform() * 6.0) as usize;
        (0..n).map(|_| (b'!' + (rng.uniform() * 90.0) as u8) as char).collect()
    }
}

fn random_csv(rng: &mut Rng) -> (String, Roles) {
    let names = [
        "id", "age", "y", "cohort", "wave", "school", "x", "born", "seen", "other",
    ];
    let delim = pick(rng, &[",", ",", ",", ";", "\t"]);
    let ncol = 1 + (rng.uniform() * 8.0) as usize;
    let mut header: Vec<&str> = (0..ncol).map(|_| pick(rng, &names)).collect();
    if rng.uniform() < 0.7 {
        header = vec!["id", "age", "y"];
        header.extend((0..(rng.uniform() * 4.0) as usize).map(|_| pick(rng, &names[3..])));
    }
    let mut text = if rng.uniform() < 0.05 {
        String::new()
    } else {
        header.join(delim) + "\n"
    };
    let nrow = (rng.uniform() * 30.0) as usize;
    // Half the files are clean but for rare faults, so the model stages run too.
    let clean = rng.uniform() < 0.5;
    for _ in 0..nrow {
        let width = if !clean && rng.uniform() < 0.1 {
            (rng.uniform() * 10.0) as usize
        } else {
            header.len()
        };
        let row: Vec<String> = (0..width)
            .map(|j| {
                if !clean || rng.uniform() < 0.02 {
                    return cell(rng);
                }
                match header.get(j).copied() {
                    Some("id") => format!("P{}", (rng.uniform() * 8.0) as u32),
                    Some("born") => "2008-02-29".to_string(),
                    Some("seen") => format!(
                        "20{}-0{}-1{}",
                        15 + (rng.uniform() * 9.0) as u32,
                        1 + (rng.uniform() * 8.0) as u32,
                        (rng.uniform() * 9.0) as u32
                    ),
                    Some("cohort") => format!("{}", 10 + 2 * (rng.uniform() * 3.0) as u32),
                    Some("wave") => format!("{}", 1 + (rng.uniform() * 4.0) as u32),
                    _ => format!("{:.3}", 5.0 + 20.0 * rng.uniform()),
                }
            })
            .collect();
        text.push_str(&row.join(delim));
        text.push_str(pick(rng, &["\n", "\n", "\r\n", ""]));
    }
    let mut roles = Roles {
        id: "id".into(),
        age: "age".into(),
        outcome: "y".into(),
        ..Default::default()
    };
    if rng.uniform() < 0.3 {
        roles.cohort = Some("cohort".into());
    }
    if rng.uniform() < 0.3 {
        roles.wave = Some("wave".into());
    }
    if rng.uniform() < 0.2 {
        roles.covariates = vec!["x".into()];
    }
    if rng.uniform() < 0.15 {
        roles.period = Some("other".into());
    }
    if rng.uniform() < 0.1 {
        roles.birth_year = Some("school".into());
    }
    if rng.uniform() < 0.15 {
        roles.birth_date = Some("born".into());
        roles.date = Some("seen".into());
    }
    (text, roles)
}

/// The same table as Parquet, sometimes with bytes flipped or cut off.
fn parquet_twin(rng: &mut Rng, text: &str, delimiter: u8, path: &std::path::Path) -> bool {
    let d = delimiter as char;
    let mut lines = text.lines();
    let Some(head) = lines.next() else { return false };
    let header: Vec<&str> = head.split(d).collect();
    let rows: Vec<Vec<String>> = lines.map(|l| l.split(d).map(str::to_string).collect()).collect();
    if data::read::write_parquet(path, data::read::columns_from_text(&header, &rows)).is_err() {
        return false;
    }
    if rng.uniform() < 0.3 {
        let mut bytes = std::fs::read(path).unwrap();
        if rng.uniform() < 0.5 {
            let cut = (rng.uniform() * bytes.len() as f64) as usize;
            bytes.truncate(cut);
        } else {
            for _ in 0..1 + (rng.uniform() * 8.0) as usize {
                let at = (rng.uniform() * bytes.len() as f64) as usize % bytes.len().max(1);
                if let Some(b) = bytes.get_mut(at) {
                    *b ^= 1 + (rng.uniform() * 254.0) as u8;
                }
            }
        }
        std::fs::write(path, bytes).unwrap();
    }
    true
}

fn random_study(rng: &mut Rng) -> String {
    let lines = [
        "[data]",
        "file = \"panel.csv\"",
        "file = 3",
        "[roles]",
        "id = \"id\"",
        "age = \"age\"",
        "outcome = \"y\"",
        "[model]",
        "method = \"reml\"",
        "method = \"bogus\"",
        "center = 16.0",
        "center = \"x\"",
        "[model.age]",
        "basis = \"polynomial\"",
        "degree = 9",
        "basis = \"spline\"",
        "interior_knots = 0",
        "knots = [1.0, 2.0]",
        "[[model.random]]",
        "factor = \"id\"",
        "slopes = [\"age\", \"nope\"]",
        "intercept = false",
        "= = =",
        "[[[",
    ];
    let n = (rng.uniform() * 14.0) as usize;
    (0..n).map(|_| pick(rng, &lines)).collect::<Vec<_>>().join("\n")
}

#[test]
fn random_files_and_study_files_never_panic() {
    let cases: usize = std::env::var("BRAID_FUZZ_CASES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(2_000);
    let dir = temp_dir("fuzz");
    let mut rng = Rng::new(424_242);
    let (mut loaded, mut refused, mut parquets) = (0usize, 0usize, 0usize);
    for case in 0..cases {
        let (text, roles) = random_csv(&mut rng);
        let path = dir.join(format!("case{}.csv", case % 16));
        std::fs::write(&path, &text).unwrap();
        let delimiter = if text.contains('\t') {
            b'\t'
        } else if text.contains(';') {
            b';'
        } else {
            b','
        };
        // Every third case goes through a Parquet twin of the same table instead.
        let parquet = dir.join(format!("case{}.parquet", case % 16));
        let path = if case % 3 == 0 && parquet_twin(&mut rng, &text, delimiter, &parquet) {
            parquets += 1;
            parquet
        } else {
            path
        };
        let result = catch_unwind(AssertUnwindSafe(|| {
            let panel = data::load(&path, &roles, ReadOptions { delimiter })?;
            if panel.n() <= 60 {
                // The whole pipeline must turn bad data into errors too.
                let spec = braid::spec::ModelSpec::default();
                let _ = crate::common::fit(&panel, &spec, &braid::infer::TrajectoryRequest::grid(3));
                let _ = braid::design::inspect(&panel, braid::design::DesignOptions::default());
            }
            Ok::<_, braid::Error>(())
        }));
        // The age–period–cohort intake and report, on the same file.
        let apc = catch_unwind(AssertUnwindSafe(|| {
            let names = [("--age", "age"), ("--period", "x"), ("--outcome", "y")];
            if let Some(d) = data::numeric_table(&path, &names, ReadOptions { delimiter })
                .ok()
                .and_then(|t| braid::apc::intake::from_records(&t, Some(2.0)).ok())
            {
                let _ = braid::apc::analysis::analyse(&d, &[], &[]);
            }
        }));
        assert!(apc.is_ok(), "panic in the APC route on generated input {case}:\n{text}");
        match result {
            Ok(Ok(())) => loaded += 1,
            Ok(Err(_)) => refused += 1,
            Err(_) => panic!("panic on generated input {case}:\n{text}"),
        }
        // A study file beside it, through the flags-and-study route.
        let study = dir.join("study.toml");
        std::fs::write(&study, random_study(&mut rng)).unwrap();
        let args = braid::cli::args::FitArgs {
            input: braid::cli::args::InputArgs {
                study: Some(study),
                ..Default::default()
            },
            grid: 11,
            ..Default::default()
        };
        let parsed = catch_unwind(AssertUnwindSafe(|| args.request().map(|_| ())));
        assert!(parsed.is_ok(), "panic on generated study file {case}");
    }
    println!(
        "{cases} generated inputs ({parquets} as Parquet): {loaded} loaded, {refused} refused with an error, none panicked"
    );
    assert!(parquets > cases / 6, "too few Parquet cases: {parquets}");
}
