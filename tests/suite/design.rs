//! The design report against the truth of seeded simulations: retention and
//! overlap are recomputed here straight from the simulated records, by code
//! that shares nothing with `braid::design`, and linkage is predicted from
//! the design's parameters alone.

use std::collections::{BTreeMap, BTreeSet};

use braid::design::{DesignOptions, inspect};
use braid::simulate::{Design, simulate};

#[test]
fn demo_design_reports_the_simulated_retention_and_overlap() {
    let design = Design::demo();
    let sim = simulate(&design);
    let report = inspect(&sim.panel(true), DesignOptions::default()).unwrap();
    // Retention: distinct participants per cohort and wave, over wave 1.
    let mut seen: BTreeMap<(String, usize), BTreeSet<String>> = BTreeMap::new();
    for r in &sim.rows {
        seen.entry((r.cohort.clone(), r.wave)).or_default().insert(r.id.clone());
    }
    assert_eq!(report.retention.len(), seen.len());
    for t in &report.retention {
        let wave: usize = t.wave.parse().unwrap();
        let n = seen[&(t.cohort.clone(), wave)].len();
        let base = seen[&(t.cohort.clone(), 1)].len();
        assert_eq!(t.n, n, "cohort {} wave {}", t.cohort, t.wave);
        assert_eq!(t.share, n as f64 / base as f64);
        if wave == 1 {
            assert_eq!(base, design.per_cohort, "everyone is seen at the first wave");
        }
    }
    // Overlap of neighbouring cohorts (entry ages in order).
    assert_eq!(report.overlap.len(), design.entry_ages.len() - 1);
    for (k, o) in report.overlap.iter().enumerate() {
        let ages = |entry: f64| -> Vec<f64> {
            let label = format!("{entry}");
            sim.rows.iter().filter(|r| r.cohort == label).map(|r| r.age).collect()
        };
        let (a, b) = (ages(design.entry_ages[k]), ages(design.entry_ages[k + 1]));
        let min = |v: &[f64]| v.iter().cloned().fold(f64::INFINITY, f64::min);
        let max = |v: &[f64]| v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let from = min(&a).max(min(&b));
        let to = max(&a).min(max(&b));
        assert_eq!((o.age_from, o.age_to), (from, to));
        assert_eq!(o.n_a, a.iter().filter(|&&x| x >= from && x <= to).count());
        assert_eq!(o.n_b, b.iter().filter(|&&x| x >= from && x <= to).count());
        // From the parameters: entry ages 2 years apart, each followed for 3
        // years, so neighbouring segments share about a year of age (with 240
        // per cohort the ±0.6-year jitter reaches its extremes).
        let follow_up = (design.waves - 1) as f64 * design.wave_gap;
        let gap = design.entry_ages[k + 1] - design.entry_ages[k];
        assert!(gap < follow_up);
        assert!(o.linked);
        assert!(o.age_to - o.age_from > follow_up - gap - 0.5);
        assert!(!o.thin);
    }
    // The age span: 12 to 23 plus jitter, in about 3 years of follow-up.
    assert!(report.span.age_from < 12.0 && report.span.age_to > 23.0);
    assert!((3.0..3.3).contains(&report.span.calendar_years), "{:?}", report.span);
}

#[test]
fn cohorts_that_share_no_ages_are_reported_as_not_linked() {
    // Entry ages 4 years apart with one year of follow-up: a gap of at least
    // 4 − 1 − 1.2 = 1.8 years between neighbours, from the parameters alone.
    let mut design = Design::demo();
    design.entry_ages = vec![12.0, 16.0, 20.0];
    design.waves = 2;
    design.per_cohort = 50;
    let sim = simulate(&design);
    let report = inspect(&sim.panel(true), DesignOptions::default()).unwrap();
    assert_eq!(report.overlap.len(), 2);
    for o in &report.overlap {
        assert!(!o.linked, "{o:?}");
        assert!(o.age_from.is_nan() && o.n_a == 0 && o.n_b == 0);
    }
    assert_eq!(
        report
            .warnings
            .iter()
            .filter(|w| w.message.contains("cannot be linked"))
            .count(),
        2
    );
    // Found by code as well as by words.
    let gaps = report
        .warning_codes
        .iter()
        .filter(|c| **c == braid::warning::WarningCode::CohortGap);
    assert_eq!(gaps.count(), 2);
}

#[test]
fn attrition_patterns_and_baseline_comparison_match_the_simulated_records() {
    let design = Design::demo();
    let sim = simulate(&design);
    let report = inspect(&sim.panel(true), DesignOptions::default()).unwrap();
    let mut waves: BTreeMap<String, BTreeSet<usize>> = BTreeMap::new();
    let mut first_score: BTreeMap<String, (usize, f64)> = BTreeMap::new();
    for r in &sim.rows {
        waves.entry(r.id.clone()).or_default().insert(r.wave);
        let e = first_score.entry(r.id.clone()).or_insert((r.wave, r.score));
        if r.wave < e.0 {
            *e = (r.wave, r.score);
        }
    }
    let (mut complete, mut monotone, mut intermittent) = (0, 0, 0);
    for w in waves.values() {
        let k = *w.iter().max().unwrap();
        if w.len() == design.waves {
            complete += 1;
        } else if w.len() == k {
            monotone += 1;
        } else {
            intermittent += 1;
        }
    }
    let p = report.attrition.patterns;
    assert_eq!(
        (p.complete, p.monotone, p.intermittent),
        (complete, monotone, intermittent)
    );
    assert!(
        p.monotone > 0 && p.intermittent > 0,
        "the demo has both kinds of missingness"
    );
    // Welch difference of baseline scores, stayers (seen at the last wave) minus leavers.
    let (mut st, mut lv) = (Vec::new(), Vec::new());
    for (id, w) in &waves {
        let v = first_score[id].1;
        if w.contains(&design.waves) {
            st.push(v)
        } else {
            lv.push(v)
        }
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let var = |v: &[f64]| {
        let m = mean(v);
        v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (v.len() as f64 - 1.0)
    };
    let b = &report.attrition.baseline[0];
    assert_eq!(b.variable, "score");
    assert_eq!((b.n_stayers, b.n_leavers), (st.len(), lv.len()));
    let diff = mean(&st) - mean(&lv);
    assert!((b.difference - diff).abs() < 1e-9);
    assert!((b.se - (var(&st) / st.len() as f64 + var(&lv) / lv.len() as f64).sqrt()).abs() < 1e-9);
    // Dropout in the simulation is completely at random: no large difference.
    assert!(b.standardized.abs() < 0.2, "{b:?}");
}

#[test]
fn fixed_schedule_makes_time_in_study_collinear_with_prior_assessments() {
    // Closed form: with ages exactly entry + (wave − 1) and no missed waves,
    // time in study equals the number of prior assessments. (A missed wave
    // breaks the identity: the retest count then lags behind time.)
    let mut design = Design::demo();
    design.per_cohort = 30;
    design.skip = 0.0;
    let simulated = simulate(&design).panel(true);
    let (waves, cohorts) = (simulated.wave().unwrap(), simulated.cohort().unwrap());
    let ages: Vec<f64> = (0..simulated.n())
        .map(|r| {
            let entry: f64 = cohorts.label(r).parse().unwrap();
            let w: f64 = waves.label(r).parse().unwrap();
            entry + w - 1.0
        })
        .collect();
    let panel = simulated.with_ages(ages).unwrap();
    let report = inspect(&panel, DesignOptions::default()).unwrap();
    assert!(report.collinear.time_retest, "{:?}", report.collinear);
    // The demo's assessment dates vary by ±0.1 year: nearly, not exactly, collinear.
    let jittered = inspect(&simulate(&design).panel(true), DesignOptions::default()).unwrap();
    assert!(!jittered.collinear.time_retest);
    assert!(jittered.collinear.time_retest_r2 > 0.99, "{:?}", jittered.collinear);
    assert!(jittered.collinear.notes.iter().any(|n| n.contains("nearly collinear")));
}

#[test]
fn with_dates_age_period_and_cohort_are_reported_collinear() {
    // Closed form: age = period − cohort, where period and cohort are the
    // assessment and birth dates in years; only calendar conventions (leap
    // days) separate the two sides, by a few days at most.
    let dir = crate::common::temp_dir("apc-dates");
    let path = dir.join("dated.csv");
    let mut text = String::from("pupil,born,seen,score\n");
    for (k, born) in ["2008-02-29", "2009-07-15", "2010-12-31", "2011-01-01", "2012-06-30"]
        .iter()
        .enumerate()
    {
        for (w, seen) in ["2021-03-01", "2022-02-28", "2023-09-30"].iter().enumerate() {
            text.push_str(&format!("P{k},{born},{seen},{}\n", 40 + k + 2 * w));
        }
    }
    std::fs::write(&path, text).unwrap();
    let roles = braid::data::Roles {
        id: "pupil".into(),
        age: "age".into(),
        outcome: "score".into(),
        birth_date: Some("born".into()),
        date: Some("seen".into()),
        ..Default::default()
    };
    let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
    let report = inspect(&panel, DesignOptions::default()).unwrap();
    assert_eq!(report.collinear.age_period_cohort, Some(true));
    let gap = report.collinear.age_period_cohort_gap.unwrap();
    assert!(gap < 0.01, "{gap}");
    // Without calendar times there is nothing to check it with.
    let undated = simulate(&Design::demo()).panel(true).without_calendar();
    let plain = inspect(&undated, DesignOptions::default()).unwrap();
    assert_eq!(plain.collinear.age_period_cohort, None);
}

/// A hand-made file with dates: three participants, two birth years.
/// Decimal ages and years follow the anniversary rule of `data::dates`.
fn dated_file(dir: &std::path::Path) -> std::path::PathBuf {
    let path = dir.join("dated.csv");
    std::fs::write(
        &path,
        "id,born,seen,y\n\
         A,2008-03-01,2020-10-01,1.0\n\
         A,2008-03-01,2021-10-15,2.0\n\
         A,2008-03-01,2022-09-20,3.5\n\
         B,2010-07-01,2020-10-03,2.0\n\
         B,2010-07-01,2022-10-01,3.0\n\
         C,2010-01-10,2020-11-01,1.5\n\
         C,2010-01-10,2021-04-01,2.5\n",
    )
    .unwrap();
    path
}

// Cohort and wave derived from dates, under each rule, against labels worked
// out by hand from the file above.
#[test]
fn cohorts_and_waves_derived_from_dates_follow_the_stated_rule() {
    use braid::data::derive::{CohortRule, WaveRule, cohorts, waves};
    let dir = crate::common::temp_dir("derive");
    let mut roles = crate::common::roles("id", "age", "y");
    roles.birth_date = Some("born".into());
    roles.date = Some("seen".into());
    let panel = braid::data::load(&dated_file(&dir), &roles, Default::default()).unwrap();
    let labels = |d: braid::data::derive::Derived| d.labels.join(" ");
    // Birth year (the default with dates), single years and pairs of years.
    let by_birth = cohorts(&panel, CohortRule::Auto).unwrap();
    assert!(by_birth.rule.to_string().contains("year of birth"), "{}", by_birth.rule);
    assert_eq!(by_birth.labels.join(" "), "2008 2008 2008 2010 2010 2010 2010");
    let pairs = cohorts(&panel, CohortRule::BirthYear { width: 2.0 }).unwrap();
    assert!(pairs.rule.to_string().contains("groups of 2 years"));
    // C is born 2010-01-10 and B 2010-07-01: both in the 2010–2011 pair.
    assert_eq!(labels(pairs), "2008 2008 2008 2010 2010 2010 2010");
    // Whole-year age at the first assessment: A 12.58, B 10.26, C 10.81.
    let by_age = cohorts(&panel, CohortRule::FirstAge { width: 1.0 }).unwrap();
    assert_eq!(labels(by_age), "12 12 12 10 10 10 10");
    // Waves: yearly rounds from each cohort's first assessment (2020-10-01
    // for 2008, 2020-10-03 for 2010), to the nearest round: A's third visit
    // on 2022-09-20 is 1.97 years on, round 3; B skips a round; C's second
    // visit comes half a year later (0.41 rounds) and clashes with its first.
    let w = waves(&panel, WaveRule::Auto, &by_birth.labels).unwrap();
    assert!(w.rule.to_string().contains("rounds of 1 year"), "{}", w.rule);
    assert_eq!(w.labels.join(" "), "1 2 3 1 3 1 1");
    assert_eq!(w.warnings.len(), 1, "{:?}", w.warnings);
    assert!(w.warnings[0].message.contains("'C'"), "{}", w.warnings[0]);
    assert_eq!(w.warnings[0].code, braid::warning::WarningCode::WaveClash);
    // Half-year rounds separate C's visits.
    let half = waves(&panel, WaveRule::Calendar { length: 0.5 }, &by_birth.labels).unwrap();
    assert_eq!(half.labels.join(" "), "1 3 5 1 5 1 2");
    assert!(half.warnings.is_empty());
    // Order of assessment needs no dates.
    let order = waves(&panel, WaveRule::Order, &by_birth.labels).unwrap();
    assert_eq!(labels(order), "1 2 3 1 2 1 2");
    // Bad widths are refused with the option named (the command line adds
    // its flag: see the cohort-width row of tests/data/bad/expected.tsv).
    let e = cohorts(&panel, CohortRule::FirstAge { width: 0.0 }).unwrap_err();
    assert!(e.to_string().starts_with("cohort_width:"), "{e}");
    // And the design report uses the derived labels and states the rules.
    let report = inspect(&panel, DesignOptions::default()).unwrap();
    assert_eq!(report.cohorts.len(), 2);
    assert!(
        report.cohort_rule.to_string().contains("year of birth") && report.wave_rule.to_string().contains("rounds")
    );
    assert!(report.warnings.iter().any(|w| w.message.contains("'C'")));
}

// A cohort belongs to a participant. With birth time derived row by row as
// period − age, rounding puts P's two birth times (2010.0001 and 2009.9999)
// on both sides of a year boundary; P still gets one cohort, from the mean
// of its rows (2010.0000), and Q, clearly born in 2011, its own.
#[test]
fn birth_year_cohorts_from_period_minus_age_keep_a_participant_in_one_cohort() {
    use braid::data::derive::{CohortRule, cohorts};
    let dir = crate::common::temp_dir("derive-boundary");
    let path = dir.join("boundary.csv");
    std::fs::write(
        &path,
        "id,age,year,y\n\
         P,10.0000,2020.0001,1.0\n\
         P,11.0002,2021.0001,2.0\n\
         Q,9.5000,2020.6000,1.5\n\
         Q,10.5000,2021.6000,2.5\n",
    )
    .unwrap();
    let mut roles = crate::common::roles("id", "age", "y");
    roles.period = Some("year".into());
    let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
    let derived = cohorts(&panel, CohortRule::Auto).unwrap();
    assert_eq!(derived.labels.join(" "), "2010 2010 2011 2011");
    assert!(
        derived.rule.to_string().contains("averaged over each participant"),
        "{}",
        derived.rule
    );
}

// Without dates: a period column alone makes cohort = period − age exact by
// construction; whole-number period and birth-year columns leave age within a
// year of period − cohort, which braid calls near-collinear.
#[test]
fn period_and_birth_year_columns_give_the_collinearity_check() {
    let dir = crate::common::temp_dir("period");
    let path = dir.join("years.csv");
    let mut text = String::from("id,age,y,year,born\n");
    let mut rng = braid::simulate::Rng::new(7);
    for i in 0..60 {
        let born = 2000 + i % 6;
        let birthday = rng.uniform();
        for w in 0..3 {
            let when = 2015.0 + w as f64 + 0.3 * rng.uniform();
            let age = when - born as f64 - birthday;
            text.push_str(&format!("P{i},{age:.4},{:.3},{},{born}\n", rng.normal(), when.floor()));
        }
    }
    std::fs::write(&path, text).unwrap();
    let mut roles = crate::common::roles("id", "age", "y");
    roles.period = Some("year".into());
    let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
    let c = inspect(&panel, DesignOptions::default()).unwrap().collinear;
    assert_eq!(c.age_period_cohort, Some(true));
    assert!(c.notes[0].contains("by construction"), "{}", c.notes[0]);
    roles.birth_year = Some("born".into());
    let panel = braid::data::load(&path, &roles, Default::default()).unwrap();
    let c = inspect(&panel, DesignOptions::default()).unwrap().collinear;
    assert_eq!(c.age_period_cohort, Some(false));
    let (gap, r2) = (c.age_period_cohort_gap.unwrap(), c.age_period_cohort_r2.unwrap());
    assert!(gap > 0.5 && gap < 1.0, "gap {gap}");
    assert!(r2 > 0.9 && r2 < 1.0, "R² {r2}");
    assert!(c.notes[0].contains("not identified"), "{}", c.notes[0]);
}
