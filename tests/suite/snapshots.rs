//! Every text screen of the demo (and the invented plan example) against a reviewed expected file in
//! tests/snapshots/, so that a change of layout is a reviewed diff. The
//! layout (every word, space and line) must match exactly; a printed number
//! may differ by two units in its last printed digit, which absorbs the
//! last-bit differences of vectorised arithmetic between processors.
//! `BRAID_UPDATE_SNAPSHOTS=1 cargo test snapshots` rewrites the files.

use std::fs;
use std::path::Path;

use crate::common::{braid, temp_dir};
use crate::tolerance::SNAPSHOT_LAST_DIGIT_UNITS;

/// A number as printed: sign, digits with separators, decimals, exponent.
fn split_numbers(line: &str) -> (String, Vec<(f64, i32)>) {
    let chars: Vec<char> = line.chars().collect();
    let (mut skeleton, mut numbers) = (String::new(), Vec::new());
    let mut i = 0;
    while i < chars.len() {
        let starts =
            chars[i].is_ascii_digit() || (chars[i] == '-' && i + 1 < chars.len() && chars[i + 1].is_ascii_digit());
        let after_word = i > 0 && (chars[i - 1].is_alphanumeric() || chars[i - 1] == '_');
        if !starts || after_word {
            skeleton.push(chars[i]);
            i += 1;
            continue;
        }
        let from = i;
        i += 1;
        while i < chars.len()
            && (chars[i].is_ascii_digit()
                || (chars[i] == ',' && i + 1 < chars.len() && chars[i + 1].is_ascii_digit())
                || (chars[i] == '.' && i + 1 < chars.len() && chars[i + 1].is_ascii_digit())
                || ((chars[i] == 'e') && i + 1 < chars.len() && (chars[i + 1] == '-' || chars[i + 1].is_ascii_digit())))
        {
            if chars[i] == 'e' {
                i += 1;
            }
            i += 1;
        }
        let text: String = chars[from..i].iter().filter(|c| **c != ',').collect();
        let decimals = text
            .split_once('.')
            .map_or(0, |(_, d)| d.chars().take_while(char::is_ascii_digit).count() as i32);
        match text.parse::<f64>() {
            Ok(v) => {
                skeleton.push('#');
                numbers.push((v, decimals));
            }
            Err(_) => skeleton.push_str(&text),
        }
    }
    (skeleton, numbers)
}

fn assert_matches(name: &str, expected: &str, got: &str) {
    let (e, g): (Vec<&str>, Vec<&str>) = (expected.lines().collect(), got.lines().collect());
    assert_eq!(
        e.len(),
        g.len(),
        "{name}: {} lines expected, {} printed:\n{got}",
        e.len(),
        g.len()
    );
    for (k, (le, lg)) in e.iter().zip(&g).enumerate() {
        let ((se, ne), (sg, ng)) = (split_numbers(le), split_numbers(lg));
        assert_eq!(
            se,
            sg,
            "{name} line {}: layout differs\nexpected: {le}\nprinted:  {lg}",
            k + 1
        );
        for ((a, d), (b, _)) in ne.iter().zip(&ng) {
            let unit = 10f64.powi(-d);
            assert!(
                (a - b).abs() <= SNAPSHOT_LAST_DIGIT_UNITS * unit + 1e-9 * a.abs(),
                "{name} line {}: {a} against {b}\nexpected: {le}\nprinted:  {lg}",
                k + 1
            );
        }
    }
}

fn screen(args: &[&str], demo: &Path) -> String {
    // Run from the repository root, so that test files are named relatively.
    let out = braid()
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(args)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The demo folder is a temporary path: shown as <demo>.
    String::from_utf8_lossy(&out.stdout).replace(&demo.display().to_string(), "<demo>")
}

#[test]
fn every_text_screen_of_the_demo_matches_its_snapshot() {
    let dir = temp_dir("snapshots");
    let demo = dir.join("demo");
    let study = demo.join("study.toml");
    let study = study.to_str().unwrap();
    let panel = demo.join("panel.csv");
    let panel = panel.to_str().unwrap();
    let screens: Vec<(&str, Vec<&str>)> = vec![
        ("demo", vec!["demo", "--out", demo.to_str().unwrap()]),
        ("fit", vec!["fit", "--study", study]),
        ("inspect", vec!["inspect", "--study", study]),
        ("converge", vec!["converge", "--study", study]),
        ("anova", vec!["anova", "--study", study]),
        (
            "apc",
            vec![
                "apc",
                panel,
                "--age",
                "age",
                "--period",
                "year",
                "--outcome",
                "score",
                "--width",
                "1",
            ],
        ),
        (
            "score",
            vec![
                "score",
                "tests/data/congeneric_items.csv",
                "--id",
                "pupil",
                "--wave",
                "wave",
                "--cohort",
                "cohort",
                "--items",
                "q1..q6",
                "--scale-min",
                "0",
                "--scale-max",
                "4",
            ],
        ),
        (
            "apc-exact",
            vec![
                "apc",
                panel,
                "--id",
                "pupil",
                "--age",
                "age",
                "--period",
                "year",
                "--outcome",
                "score",
                "--cluster",
                "school",
            ],
        ),
        (
            "plan",
            vec!["plan", "examples/plans/reading.toml", "--route", "information"],
        ),
    ];
    let folder = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("snapshots");
    let update = std::env::var_os("BRAID_UPDATE_SNAPSHOTS").is_some();
    for (name, args) in screens {
        let got = screen(&args, &demo);
        let file = folder.join(format!("{name}.txt"));
        if update {
            fs::write(&file, &got).unwrap();
            continue;
        }
        let expected = fs::read_to_string(&file).unwrap_or_else(|e| panic!("{}: {e}", file.display()));
        assert_matches(name, &expected, &got);
    }
}

// The comparison itself: layout exact, numbers to two units of the last digit.
#[test]
fn snapshot_comparison_allows_last_digit_noise_only() {
    assert_matches("same", "a 1.2345 b -0.5", "a 1.2346 b -0.5");
    assert_matches("separators", "n 1,200 rows", "n 1,200 rows");
    let differs = std::panic::catch_unwind(|| assert_matches("x", "a 1.2345", "a 1.2355"));
    assert!(differs.is_err(), "a change of ten units in the last digit must fail");
    let layout = std::panic::catch_unwind(|| assert_matches("x", "age 12 to 13", "age 12 - 13"));
    assert!(layout.is_err(), "a change of words must fail");
}
