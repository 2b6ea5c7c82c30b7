//! Scoring and reliability against pingouin 0.7.0's cronbach_alpha, Feldt's
//! interval with scipy 1.17.1 and statsmodels 0.15.0's one-factor ML
//! loadings (tests/reference/score_reference.py, score.json), on the SAPA
//! Agreeableness items (Revelle, Wilt & Rosenthal 2010) and invented
//! congeneric items; closed forms.

use braid::score::{ItemColumns, ItemInput, Reliability, ScoreOptions, ScoreReport, ScoreRule, expand_items, score};

use crate::common::{data_dir, reference_json, temp_dir};
use crate::tolerance::{ALPHA_ABS, EQUATING_ABS, LOADING_ABS, TAU_EQUIVALENT_ABS};

fn run(file: &str, columns: ItemColumns, options: &ScoreOptions) -> ScoreReport {
    let input = ItemInput::read(&data_dir().join(file), &columns, Default::default()).unwrap();
    score(&input, options).unwrap()
}

/// Score an invented item file, written from `text` into a fresh folder.
fn score_text(folder: &str, text: &str, columns: &ItemColumns, options: &ScoreOptions) -> ScoreReport {
    let path = temp_dir(folder).join("items.csv");
    std::fs::write(&path, text).unwrap();
    score(&ItemInput::read(&path, columns, Default::default()).unwrap(), options).unwrap()
}

fn bfi() -> ScoreReport {
    let columns = ItemColumns {
        id: "id".into(),
        wave: "wave".into(),
        cohort: Some("gender".into()),
        form: None,
        pass: vec!["age".into()],
        items: expand_items("A1..A5").unwrap(),
    };
    let options = ScoreOptions::new(vec!["A1".into()], 1.0, 6.0, ScoreRule::Mean, 4).unwrap();
    run("bfi_agreeableness.csv", columns, &options)
}

fn check(r: &Reliability, want: &serde_json::Value, feldt_key: &str, ci_tolerance: f64, what: &str) {
    let f = r.one_factor.as_ref().expect("one factor");
    assert!(f.converged, "{what}: the one-factor fit converged");
    for (j, (got, w)) in f.loadings.iter().zip(want["loadings"].as_array().unwrap()).enumerate() {
        let w = w.as_f64().unwrap();
        assert!((got - w).abs() < LOADING_ABS, "{what}: loading {j} {got} against {w}");
    }
    assert_eq!(r.n as u64, want["n"].as_u64().unwrap(), "{what}: respondents used");
    let alpha = want["alpha"].as_f64().unwrap();
    assert!(
        (r.alpha - alpha).abs() < ALPHA_ABS,
        "{what}: α {} against {alpha}",
        r.alpha
    );
    let ci = &want[feldt_key];
    for (got, w) in [(r.alpha_lower, &ci[0]), (r.alpha_upper, &ci[1])] {
        let w = w.as_f64().unwrap();
        assert!(
            (got - w).abs() <= ci_tolerance,
            "{what}: interval end {got} against {w}"
        );
    }
}

// Outside check: α to 1e-9 against pingouin on the published items (with
// blanks, listwise) and on complete congeneric items. Feldt's interval: on
// the items with blanks against Feldt's formula with scipy's F quantiles on
// the respondents used (pingouin's own interval there takes n before
// listwise deletion); on complete items against pingouin's interval, which
// it rounds to 3 decimals.
#[test]
fn alpha_and_feldt_interval_match_the_reference() {
    let want = reference_json("score.json");
    let r = bfi();
    check(&r.per_wave[0], &want["bfi"]["all"], "feldt", ALPHA_ABS, "bfi");
    for c in &r.per_cohort {
        let key = format!("gender {}", c.cohort.as_deref().unwrap());
        check(c, &want["bfi"][&key], "feldt", ALPHA_ABS, &key);
    }
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        cohort: Some("cohort".into()),
        form: None,
        pass: vec!["age".into()],
        items: expand_items("q1..q6").unwrap(),
    };
    let options = ScoreOptions::new(Vec::new(), 0.0, 4.0, ScoreRule::Sum, 6).unwrap();
    let r = run("congeneric_items.csv", columns, &options);
    for w in &r.per_wave {
        let key = format!("wave {}", w.wave.as_deref().unwrap());
        check(w, &want["congeneric"][&key], "ci_pingouin", 5e-4 + 1e-12, &key);
        check(w, &want["congeneric"][&key], "feldt", ALPHA_ABS, &key);
    }
    assert_eq!(r.per_cohort_wave.len(), 6);
}

// Closed forms: standardized α is k·r̄/(1 + (k − 1)·r̄) with r̄ the mean
// inter-item correlation (Cronbach 1951), computed here from the keyed
// responses directly; reversing twice is the identity; a prorated sum with
// no blank item is the plain sum.
#[test]
fn closed_forms_of_scoring() {
    let r = bfi();
    let text = std::fs::read_to_string(data_dir().join("bfi_agreeableness.csv")).unwrap();
    let rows: Vec<Vec<f64>> = text
        .lines()
        .skip(1)
        .map(|l| {
            l.split(',')
                .skip(4)
                .map(|v| v.parse::<f64>().unwrap_or(f64::NAN))
                .collect::<Vec<f64>>()
        })
        .filter(|r| r.iter().all(|v| v.is_finite()))
        .map(|mut r| {
            r[0] = 7.0 - r[0];
            r
        })
        .collect();
    let k = 5;
    let n = rows.len() as f64;
    let mean: Vec<f64> = (0..k).map(|j| rows.iter().map(|r| r[j]).sum::<f64>() / n).collect();
    let cov = |a: usize, b: usize| rows.iter().map(|r| (r[a] - mean[a]) * (r[b] - mean[b])).sum::<f64>();
    let mut r_sum = 0.0;
    for a in 0..k {
        for b in a + 1..k {
            r_sum += cov(a, b) / (cov(a, a) * cov(b, b)).sqrt();
        }
    }
    let r_bar = r_sum / 10.0;
    let standardized = 5.0 * r_bar / (1.0 + 4.0 * r_bar);
    assert!((r.per_wave[0].alpha_standardized - standardized).abs() < ALPHA_ABS);

    // Reverse keying twice: a file whose A1 is already reversed, reversed again.
    let flipped: String = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                return format!("{l}\n");
            }
            let mut f: Vec<String> = l.split(',').map(str::to_string).collect();
            if let Ok(v) = f[4].parse::<f64>() {
                f[4] = format!("{}", 7.0 - v);
            }
            format!("{}\n", f.join(","))
        })
        .collect();
    let path = temp_dir("score_flip").join("flipped.csv");
    std::fs::write(&path, flipped).unwrap();
    let columns = ItemColumns {
        id: "id".into(),
        wave: "wave".into(),
        items: expand_items("A1..A5").unwrap(),
        ..Default::default()
    };
    let plain = ScoreOptions::new(Vec::new(), 1.0, 6.0, ScoreRule::Mean, 4).unwrap();
    let twice = score(&ItemInput::read(&path, &columns, Default::default()).unwrap(), &plain).unwrap();
    for (a, b) in r.scores.iter().zip(&twice.scores) {
        assert!(a.score == b.score || (a.score.is_nan() && b.score.is_nan()));
    }

    // Prorating with every item answered is the plain sum.
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        items: expand_items("q1..q6").unwrap(),
        ..Default::default()
    };
    let sum = ScoreOptions::new(Vec::new(), 0.0, 4.0, ScoreRule::Sum, 6).unwrap();
    let r = run("congeneric_items.csv", columns, &sum);
    let text = std::fs::read_to_string(data_dir().join("congeneric_items.csv")).unwrap();
    for (line, row) in text.lines().skip(1).zip(&r.scores) {
        let plain: f64 = line.split(',').skip(4).map(|v| v.parse::<f64>().unwrap()).sum();
        assert!((row.score - plain).abs() < 1e-12 && row.n_answered == 6);
    }
}

#[test]
fn item_lists_expand_ranges_and_refuse_bad_ones() {
    assert_eq!(expand_items("q1..q3, x").unwrap(), vec!["q1", "q2", "q3", "x"]);
    assert!(expand_items("q3..q1").is_err());
    assert!(expand_items("a1..b3").is_err());
}

// Closed form: for tau-equivalent items (equal loadings, unequal error
// variances) α equals ω in the population; in 20,000 simulated respondents
// they agree within sampling error.
#[test]
fn alpha_equals_omega_for_tau_equivalent_items() {
    use braid::score::reliability::reliability;
    let mut rng = braid::simulate::Rng::new(1951);
    let errors = [0.5, 0.8, 1.0, 1.2, 0.6];
    let rows: Vec<Vec<f64>> = (0..20_000)
        .map(|_| {
            let t = rng.normal();
            errors.iter().map(|e| 0.7 * t + e * rng.normal()).collect()
        })
        .collect();
    let refs: Vec<&[f64]> = rows.iter().map(Vec::as_slice).collect();
    let names: Vec<String> = (1..=5).map(|i| format!("q{i}")).collect();
    let r = reliability(&names, &refs, None, None);
    let omega = r.omega.unwrap();
    assert!((r.alpha - omega).abs() < TAU_EQUIVALENT_ABS, "α {} ω {omega}", r.alpha);
}

// Recovery: an item whose loading drops from 0.9 to 0.1 between two waves
// (invented, seeded) is flagged as moving; items with steady loadings are not.
#[test]
fn an_item_whose_loading_moves_between_waves_is_flagged() {
    let mut rng = braid::simulate::Rng::new(77);
    let mut text = String::from("pupil,wave,q1,q2,q3,q4\n");
    for p in 0..2000 {
        for wave in [1, 2] {
            let t = rng.normal();
            let moving = if wave == 1 { 0.9 } else { 0.1 };
            let loads = [0.8, 0.8, 0.8, moving];
            let row: Vec<String> = loads
                .iter()
                .map(|l| format!("{:.4}", 2.0 + l * t + 0.5 * rng.normal()))
                .collect();
            text.push_str(&format!("P{p},{wave},{}\n", row.join(",")));
        }
    }
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        items: expand_items("q1..q4").unwrap(),
        ..Default::default()
    };
    let options = ScoreOptions::new(Vec::new(), -10.5, 14.5, ScoreRule::Mean, 4).unwrap();
    let r = score_text("score_shift", &text, &columns, &options);
    let moved: Vec<&str> = r.loading_shifts.iter().map(|m| m.item.as_str()).collect();
    assert_eq!(moved, vec!["q4"]);
}

/// An invented two-form study: at each of two waves half of the respondents
/// (at random) take form B, whose item responses are a + b × the form-A
/// responses they would have given.
fn two_forms(a: f64, b: f64, seed: u64) -> ScoreReport {
    let mut rng = braid::simulate::Rng::new(seed);
    let mut text = String::from("pupil,wave,form,q1,q2,q3,q4\n");
    for p in 0..4000 {
        let t = rng.normal();
        for wave in [1, 2] {
            let form_b = rng.uniform() < 0.5;
            let row: Vec<String> = (0..4)
                .map(|_| {
                    let x = 5.0 + t + 0.8 * rng.normal();
                    format!("{:.6}", if form_b { a + b * x } else { x })
                })
                .collect();
            text.push_str(&format!(
                "P{p},{wave},{},{}\n",
                if form_b { "B" } else { "A" },
                row.join(",")
            ));
        }
    }
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        form: Some("form".into()),
        items: expand_items("q1..q4").unwrap(),
        ..Default::default()
    };
    let options = ScoreOptions::new(Vec::new(), -100.5, 100.5, ScoreRule::Mean, 4).unwrap();
    score_text(&format!("score_forms_{seed}"), &text, &columns, &options)
}

// Recovery: form B = a + b·form A on randomly equivalent groups; the mean–
// sigma constants that put B on A's scale, slope 1/b and intercept −a/b, are
// recovered within 2 bootstrap SEs; identical forms give the identity.
#[test]
fn equating_recovers_a_linear_form_and_the_identity() {
    for (a, b, seed) in [(3.0, 1.2, 11), (0.0, 1.0, 12)] {
        let r = two_forms(a, b, seed);
        let e = &r.equating[0];
        assert_eq!((e.form.as_str(), e.reference.as_str()), ("B", "A"));
        let (slope, intercept) = (1.0 / b, -a / b);
        assert!(
            (e.slope - slope).abs() < 2.0 * e.slope_se,
            "slope {} ± {} against {slope}",
            e.slope,
            e.slope_se
        );
        assert!(
            (e.intercept - intercept).abs() < 2.0 * e.intercept_se,
            "intercept {} ± {} against {intercept}",
            e.intercept,
            e.intercept_se
        );
        // The equated scores of form B are on A's scale: equal means at the wave.
        let (ma, mb) = mean_by_form(&r, &e.wave);
        assert!((ma - mb).abs() < 0.1, "equated means {ma} {mb}");
    }
}

fn mean_by_form(r: &ScoreReport, wave: &str) -> (f64, f64) {
    let mut sums = [(0.0, 0usize), (0.0, 0usize)];
    for row in &r.scores {
        let f: Vec<&str> = row.labels.split(',').collect();
        if f[1] == wave {
            let k = usize::from(f[2] == "B");
            sums[k].0 += row.score;
            sums[k].1 += 1;
        }
    }
    (sums[0].0 / sums[0].1 as f64, sums[1].0 / sums[1].1 as f64)
}

// A study file that names its scale scores it on the fly: fitting that study
// gives the same fit as fitting the scores.csv that `braid score` writes
// with the same settings (an identity of the two routes).
#[test]
fn a_study_file_scale_is_scored_on_the_fly_like_score_csv() {
    use crate::common::{braid, read_json, run_ok};
    let dir = temp_dir("score_study");
    let data = data_dir().join("congeneric_items.csv");
    run_ok(
        braid()
            .arg("score")
            .arg(&data)
            .args(["--id", "pupil", "--wave", "wave", "--cohort", "cohort", "--pass", "age"])
            .args([
                "--items",
                "q1..q6",
                "--scale-min",
                "0",
                "--scale-max",
                "4",
                "--rule",
                "sum",
                "--quiet",
                "--out",
            ])
            .arg(dir.join("scored")),
    );
    run_ok(
        braid()
            .arg("fit")
            .arg(dir.join("scored").join("scores.csv"))
            .args([
                "--id",
                "pupil",
                "--age",
                "age",
                "--outcome",
                "score",
                "--cohort",
                "cohort",
                "--quiet",
                "--json",
            ])
            .arg(dir.join("from_csv.json")),
    );
    run_ok(
        braid()
            .args(["fit", "--quiet", "--study"])
            .arg(data_dir().join("scored_study.toml"))
            .arg("--json")
            .arg(dir.join("from_study.json")),
    );
    let (a, b) = (
        read_json(&dir.join("from_csv.json")),
        read_json(&dir.join("from_study.json")),
    );
    assert!(a["loglik"].is_number() && a["fixed"].as_array().is_some_and(|f| f.len() == 3));
    assert_eq!(a["loglik"], b["loglik"]);
    assert_eq!(a["fixed"], b["fixed"]);
}

// Common items: form A at wave 1 and form B at wave 2 to groups that are not
// equivalent (wave 2 is 0.8 SD abler); q1 and q2 are anchors on both forms,
// and B's other items are a + b × the A responses the same respondents would
// have given. Chained linear equating through the anchors puts B's scores on
// A's scale: the wave-2 group's equated scores have the mean and SD of the A
// scores it would have had (simulated alongside).
#[test]
fn common_item_equating_recovers_the_counterfactual_scale() {
    let (a, b) = (1.5, 1.3);
    let mut rng = braid::simulate::Rng::new(4242);
    let mut text = String::from("pupil,wave,form,q1,q2,q3,q4,q5,q6\n");
    let mut counterfactual = Vec::new();
    for p in 0..6000 {
        let wave = if p < 3000 { 1 } else { 2 };
        let t = rng.normal() + if wave == 2 { 0.8 } else { 0.0 };
        let x: Vec<f64> = (0..6).map(|_| 5.0 + t + 0.6 * rng.normal()).collect();
        let row: Vec<f64> = if wave == 2 {
            counterfactual.push(x.iter().sum::<f64>() / 6.0);
            x.iter()
                .enumerate()
                .map(|(j, v)| if j < 2 { *v } else { a + b * v })
                .collect()
        } else {
            x.clone()
        };
        let cells: Vec<String> = row.iter().map(|v| format!("{v:.6}")).collect();
        text.push_str(&format!(
            "P{p},{wave},{},{}\n",
            if wave == 2 { "B" } else { "A" },
            cells.join(",")
        ));
    }
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        form: Some("form".into()),
        items: expand_items("q1..q6").unwrap(),
        ..Default::default()
    };
    let mut options = ScoreOptions::new(Vec::new(), -100.5, 100.5, ScoreRule::Mean, 6).unwrap();
    options.anchor = vec!["q1".into(), "q2".into()];
    let r = score_text("score_anchor", &text, &columns, &options);
    let e = &r.equating[0];
    assert_eq!(e.design, "common items");
    let equated: Vec<f64> = r
        .scores
        .iter()
        .filter(|s| s.labels.ends_with(",B"))
        .map(|s| s.score)
        .collect();
    let (m1, v1) = braid::stats::mean_var(&equated);
    let (m0, v0) = braid::stats::mean_var(&counterfactual);
    assert!(
        (m1 - m0).abs() < EQUATING_ABS,
        "equated mean {m1} against {m0} (slope {} ± {})",
        e.slope,
        e.slope_se
    );
    assert!(
        (v1.sqrt() - v0.sqrt()).abs() < EQUATING_ABS,
        "equated SD {} against {}",
        v1.sqrt(),
        v0.sqrt()
    );
}

// An item that is constant at a wave is reported with a warning and left out
// of ω there; α and the other items are still reported.
#[test]
fn a_constant_item_at_a_wave_is_reported_and_left_out_of_omega() {
    let mut rng = braid::simulate::Rng::new(5);
    let mut text = String::from("pupil,wave,q1,q2,q3,q4\n");
    for p in 0..300 {
        for wave in [1, 2] {
            let t = rng.normal();
            let cells: Vec<String> = (0..4)
                .map(|j| {
                    let v = (2.0 + t + 0.7 * rng.normal()).round().clamp(0.0, 4.0);
                    // q3 is always 2 at wave 2.
                    format!("{}", if wave == 2 && j == 2 { 2.0 } else { v })
                })
                .collect();
            text.push_str(&format!("P{p},{wave},{}\n", cells.join(",")));
        }
    }
    let columns = ItemColumns {
        id: "pupil".into(),
        wave: "wave".into(),
        items: expand_items("q1..q4").unwrap(),
        ..Default::default()
    };
    let options = ScoreOptions::new(Vec::new(), 0.0, 4.0, ScoreRule::Mean, 3).unwrap();
    let r = score_text("score_constant", &text, &columns, &options);
    assert_eq!(r.warning_codes, vec![braid::warning::WarningCode::ConstantItem]);
    let w2 = &r.per_wave[1];
    assert_eq!(w2.constant_items, vec!["q3"]);
    let f = w2.one_factor.as_ref().expect("ω from the other three items");
    assert_eq!(f.loadings.len(), 4);
    assert!(f.loadings[2].is_nan() && f.loadings.iter().filter(|l| l.is_finite()).count() == 3);
    assert!(w2.alpha.is_finite() && r.per_wave[0].constant_items.is_empty());
}
