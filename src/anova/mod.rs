//! The classical cohort × wave mixed (split-plot) ANOVA of a cohort-sequential
//! study: cohort between participants, wave within, on complete cases.
//!
//! [`mixed_anova`] takes a loaded panel and validated [`AnovaOptions`] and
//! returns an [`AnovaReport`]: the table (with Greenhouse–Geisser and
//! Huynh–Feldt corrections of the within effects), Mauchly's test on the
//! pooled within-cohort covariance, Box's M, partial and generalized η², and
//! the simple effects of wave within each cohort with Holm's adjustment.

pub mod mixed;
pub mod sphericity;
pub mod table;

use std::collections::{BTreeSet, HashMap};

use serde::Serialize;

use crate::data::derive::{self, AppliedRule, CohortRule, WaveRule};
use crate::data::{DataSummary, Panel, label_order};
use crate::error::{Error, Result};
use crate::infer::hypothesis::{f_sf, holm};
use crate::warning::{Warning, WarningCode};

pub use mixed::{MixedComparison, MixedTest};
pub use sphericity::{BoxM, Sphericity};
pub use table::{Complete, Effect, ErrorTerm};

/// Settings of the mixed ANOVA, validated by [`AnovaOptions::new`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct AnovaOptions {
    /// Mauchly's test rejecting at this level counts as sphericity failing.
    pub sphericity_alpha: f64,
    /// How cohorts are found when the file has no cohort column.
    pub cohort_rule: CohortRule,
    /// How waves are found when the file has no wave column.
    pub wave_rule: WaveRule,
}

impl Default for AnovaOptions {
    fn default() -> Self {
        AnovaOptions {
            sphericity_alpha: 0.05,
            cohort_rule: CohortRule::Auto,
            wave_rule: WaveRule::Auto,
        }
    }
}

impl AnovaOptions {
    /// Validated settings.
    ///
    /// # Errors
    /// [`Error::Spec`] for a sphericity level outside (0, 1).
    pub fn new(sphericity_alpha: f64, cohort_rule: CohortRule, wave_rule: WaveRule) -> Result<AnovaOptions> {
        let o = AnovaOptions {
            sphericity_alpha,
            cohort_rule,
            wave_rule,
        };
        o.validate()?;
        Ok(o)
    }

    fn validate(&self) -> Result<()> {
        if !(self.sphericity_alpha > 0.0 && self.sphericity_alpha < 1.0) {
            return Err(Error::Spec {
                parameter: "sphericity_alpha".into(),
                message: format!("{} is not a level between 0 and 1", self.sphericity_alpha),
            });
        }
        Ok(())
    }
}

/// The simple effect of wave within one cohort: a one-way repeated-measures
/// ANOVA of that cohort's participants.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SimpleEffect {
    /// The cohort.
    pub cohort: String,
    /// F.
    pub f: f64,
    /// Numerator df.
    pub df1: f64,
    /// Denominator df.
    pub df2: f64,
    /// p, uncorrected.
    pub p: f64,
    /// The cohort's own Greenhouse–Geisser epsilon.
    pub epsilon_gg: f64,
    /// p with the GG-corrected df.
    pub p_gg: f64,
    /// The GG p adjusted by Holm (1979) over the cohorts.
    pub p_holm: f64,
}

/// Participants left out of the complete-case analysis, against those kept.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Dropped {
    /// Mean first observed outcome of the participants kept.
    pub kept_baseline_mean: f64,
    /// Mean first observed outcome of those dropped.
    pub dropped_baseline_mean: f64,
    /// The difference (dropped − kept) in units of the kept participants' SD.
    pub standardized_difference: f64,
}

/// The mixed ANOVA report, with stable JSON keys.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AnovaReport {
    /// What was read and used.
    pub data: DataSummary,
    /// The settings that produced it.
    pub options: AnovaOptions,
    /// How cohorts were found.
    pub cohort_rule: AppliedRule,
    /// How waves were found.
    pub wave_rule: AppliedRule,
    /// Warnings in plain words.
    pub warnings: Vec<Warning>,
    /// The code of each warning.
    pub warning_codes: Vec<WarningCode>,
    /// Cohorts, in order.
    pub cohorts: Vec<String>,
    /// The waves analysed (those every cohort has).
    pub waves: Vec<String>,
    /// Complete cases per cohort.
    pub cohort_sizes: Vec<usize>,
    /// Participants with every analysed wave.
    pub n_complete: usize,
    /// Participants left out for a missing wave.
    pub n_dropped: usize,
    /// Those left out against those kept, when any were left out.
    pub dropped: Option<Dropped>,
    /// Cohort × wave means, one row per cohort.
    pub means: Vec<Vec<f64>>,
    /// Their standard errors (the cell's SD over the root of its size).
    pub mean_se: Vec<Vec<f64>>,
    /// Mean exact age of each cohort × wave cell.
    pub mean_ages: Vec<Vec<f64>>,
    /// The tests of the complete cases (their keys sit at the top level).
    #[serde(flatten)]
    pub analysis: Analysis,
    /// What the stitched model of `braid fit` would use of the same file.
    pub stitched_uses: StitchedUse,
}

/// Rows and participants: the ANOVA's complete cases against every
/// observed assessment, which the stitched mixed model keeps.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct StitchedUse {
    /// Rows in the ANOVA (complete cases × analysed waves).
    pub anova_rows: usize,
    /// Participants in the ANOVA.
    pub anova_participants: usize,
    /// Rows the stitched model uses (every row with an outcome and an age).
    pub stitched_rows: usize,
    /// Participants it uses.
    pub stitched_participants: usize,
}

/// Run the cohort × wave mixed ANOVA on the complete cases of `panel`.
///
/// # Errors
/// [`Error::Data`] for a repeated wave within a participant, a participant
/// in two cohorts, one wave or one cohort, no complete cases, or a cohort or
/// wave with a single participant; [`Error::Spec`] for invalid options.
pub fn mixed_anova(panel: &Panel, options: &AnovaOptions) -> Result<AnovaReport> {
    options.validate()?;
    let cohort = derive::cohorts(panel, options.cohort_rule)?;
    let wave = derive::waves(panel, options.wave_rule, &cohort.labels)?;
    let mut warnings: Vec<Warning> = cohort.warnings.iter().chain(&wave.warnings).cloned().collect();
    let design = assemble(panel, &cohort.labels, &wave.labels, &mut warnings)?;
    let c = &design.complete;
    let a = analyse(c, &design.cohorts, options.sphericity_alpha)?;
    let rows = |v: Vec<f64>| v.chunks(c.k).map(<[f64]>::to_vec).collect::<Vec<_>>();
    Ok(AnovaReport {
        data: panel.summary(),
        options: *options,
        cohort_rule: cohort.rule,
        wave_rule: wave.rule,
        warning_codes: crate::warning::codes(&warnings),
        warnings,
        cohort_sizes: c.sizes(),
        n_complete: c.n(),
        n_dropped: design.n_dropped,
        dropped: design.dropped,
        means: rows(c.cell_means()),
        mean_se: rows(cell_se(c)),
        mean_ages: rows(c.cell_means_of(&c.age)),
        analysis: a,
        stitched_uses: StitchedUse {
            anova_rows: c.n() * c.k,
            anova_participants: c.n(),
            stitched_rows: panel.n(),
            stitched_participants: panel.id().n_levels(),
        },
        cohorts: design.cohorts,
        waves: design.waves,
    })
}

/// Every test of the complete cases.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Analysis {
    /// The table: cohort, wave, cohort × wave.
    pub effects: Vec<Effect>,
    /// The two error terms.
    pub errors: Vec<ErrorTerm>,
    /// Mauchly's test (absent with two waves: sphericity holds trivially).
    pub sphericity: Option<Sphericity>,
    /// Box's M (absent when a cohort has no more participants than waves).
    pub box_m: Option<BoxM>,
    /// Wave within each cohort.
    pub simple_effects: Vec<SimpleEffect>,
    /// Which within-effect p to read, and why.
    pub recommendation: String,
    /// The same complete cases as a compound-symmetry mixed model.
    pub mixed_model_comparison: MixedComparison,
}

impl Analysis {
    /// Every p-value printed, named, in screen order: the table (uncorrected,
    /// GG and HF), Mauchly, Box's M, the mixed model, then each cohort's
    /// GG-corrected simple effect under one name (Holm's adjusted values are
    /// left out: they control a family, not one test).
    pub fn p_values(&self) -> Vec<(&'static str, f64)> {
        let e = &self.effects;
        let mut v = vec![("cohort", e[0].p)];
        for (name, i) in [("wave", 1), ("cohort × wave", 2)] {
            v.push((name, e[i].p));
            v.push((
                if i == 1 { "wave GG" } else { "cohort × wave GG" },
                e[i].p_gg.unwrap_or(f64::NAN),
            ));
            v.push((
                if i == 1 { "wave HF" } else { "cohort × wave HF" },
                e[i].p_hf.unwrap_or(f64::NAN),
            ));
        }
        v.push(("Mauchly", self.sphericity.as_ref().map_or(f64::NAN, |s| s.p)));
        v.push(("Box's M", self.box_m.as_ref().map_or(f64::NAN, |b| b.p)));
        for (name, t) in ["mixed model wave", "mixed model cohort × wave"]
            .iter()
            .zip(&self.mixed_model_comparison.tests)
        {
            v.push((name, t.p));
        }
        v.extend(
            self.simple_effects
                .iter()
                .map(|s| ("simple effect of wave (GG)", s.p_gg)),
        );
        v
    }
}

/// The table, the sphericity and covariance tests, the simple effects and
/// the mixed model of complete cases (for simulations that build
/// [`Complete`] directly).
///
/// # Errors
/// Errors of the mixed-model engine.
pub fn analyse(c: &Complete, cohorts: &[String], sphericity_alpha: f64) -> Result<Analysis> {
    let sums = table::sums(c);
    let (pooled, df) = sphericity::within_covariance(c, None);
    let m = sphericity::contrast_covariance(&pooled, c.k);
    let gg = sphericity::epsilon_gg(&m);
    let hf = sphericity::epsilon_hf(gg, c.n(), c.groups, c.k - 1);
    let (effects, errors) = table::table(c, &sums, gg, hf);
    let sphericity = sphericity::mauchly(&m, df, c.k);
    Ok(Analysis {
        recommendation: recommend(sphericity.as_ref(), gg, sphericity_alpha),
        mixed_model_comparison: mixed::compare(c, &effects)?,
        box_m: sphericity::box_m(c),
        simple_effects: simple_effects(c, cohorts),
        effects,
        errors,
        sphericity,
    })
}

/// The standard error of each cell mean.
fn cell_se(c: &Complete) -> Vec<f64> {
    let (k, sizes, means) = (c.k, c.sizes(), c.cell_means());
    let mut ss = vec![0.0; c.groups * k];
    for (i, &g) in c.cohort.iter().enumerate() {
        for j in 0..k {
            ss[g * k + j] += (c.y[i * k + j] - means[g * k + j]).powi(2);
        }
    }
    (0..c.groups * k)
        .map(|cell| {
            let n = sizes[cell / k] as f64;
            (ss[cell] / (n - 1.0) / n).sqrt()
        })
        .collect()
}

/// Which correction to read (common practice, a rule of thumb: Girden 1992).
fn recommend(s: Option<&Sphericity>, gg: f64, alpha: f64) -> String {
    match s {
        None => "two waves: sphericity holds trivially; read the uncorrected p".into(),
        Some(s) if s.p >= alpha => format!(
            "Mauchly's test does not reject sphericity (p ≥ {alpha}), but it has little power in small samples; the \
             Greenhouse–Geisser p (ε = {gg:.3}) is the safe reading"
        ),
        Some(_) if gg < 0.75 => format!(
            "sphericity fails: read the Greenhouse–Geisser p (ε = {gg:.3} < .75; a rule of thumb, not a theorem)"
        ),
        Some(_) => format!(
            "sphericity fails: read the Huynh–Feldt p (ε_GG = {gg:.3} ≥ .75, where GG is conservative; a rule of thumb, \
             not a theorem)"
        ),
    }
}

/// Wave within each cohort: a one-way repeated-measures F of that cohort's
/// participants, GG-corrected by the cohort's own epsilon, Holm over cohorts.
fn simple_effects(c: &Complete, cohorts: &[String]) -> Vec<SimpleEffect> {
    let k = c.k;
    let mut out: Vec<SimpleEffect> = (0..c.groups)
        .map(|g| {
            let rows: Vec<usize> = (0..c.n()).filter(|&i| c.cohort[i] == g).collect();
            let n = rows.len() as f64;
            let y = |i: usize, j: usize| c.y[rows[i] * k + j];
            let grand = rows.iter().flat_map(|&r| &c.y[r * k..(r + 1) * k]).sum::<f64>() / (n * k as f64);
            let wave_mean: Vec<f64> = (0..k)
                .map(|j| (0..rows.len()).map(|i| y(i, j)).sum::<f64>() / n)
                .collect();
            let subj_mean: Vec<f64> = (0..rows.len())
                .map(|i| (0..k).map(|j| y(i, j)).sum::<f64>() / k as f64)
                .collect();
            let ss_wave: f64 = wave_mean.iter().map(|w| n * (w - grand).powi(2)).sum();
            let ss_err: f64 = (0..rows.len())
                .flat_map(|i| (0..k).map(move |j| (i, j)))
                .map(|(i, j)| (y(i, j) - wave_mean[j] - subj_mean[i] + grand).powi(2))
                .sum();
            let (df1, df2) = ((k - 1) as f64, (k - 1) as f64 * (n - 1.0));
            let f = (ss_wave / df1) / (ss_err / df2);
            let (s, _) = sphericity::within_covariance(c, Some(g));
            let eps = sphericity::epsilon_gg(&sphericity::contrast_covariance(&s, k));
            SimpleEffect {
                cohort: cohorts[g].clone(),
                f,
                df1,
                df2,
                p: f_sf(f, df1, df2),
                epsilon_gg: eps,
                p_gg: f_sf(f, (df1 * eps).max(1.0), (df2 * eps).max(1.0)),
                p_holm: f64::NAN,
            }
        })
        .collect();
    let adjusted = holm(&out.iter().map(|s| s.p_gg).collect::<Vec<_>>());
    for (s, p) in out.iter_mut().zip(adjusted) {
        s.p_holm = p;
    }
    out
}

/// Each participant's cohort, and outcome and data row at each wave.
type Seen<'a> = HashMap<u32, (usize, HashMap<&'a str, (f64, usize)>)>;

/// The complete cases and what was left out.
struct Design {
    complete: Complete,
    cohorts: Vec<String>,
    waves: Vec<String>,
    n_dropped: usize,
    dropped: Option<Dropped>,
}

fn sorted(set: BTreeSet<&str>) -> Vec<String> {
    let mut v: Vec<String> = set.into_iter().map(str::to_string).collect();
    v.sort_by(|a, b| label_order(a, b));
    v
}

/// Gather each participant's waves, refuse what the ANOVA cannot use, keep
/// the waves every cohort has and the participants who have all of them.
fn assemble(panel: &Panel, cohort_of: &[String], wave_of: &[String], warnings: &mut Vec<Warning>) -> Result<Design> {
    let ids = panel.id().codes();
    let bad = |r: usize, message: String| Error::Data {
        path: panel.source().to_path_buf(),
        message: format!("data row {}: {message}", panel.rows()[r]),
    };
    let cohorts = sorted(cohort_of.iter().map(String::as_str).collect());
    let all_waves = sorted(wave_of.iter().map(String::as_str).collect());
    if cohorts.len() < 2 || all_waves.len() < 2 {
        return Err(Error::Data {
            path: panel.source().to_path_buf(),
            message: format!(
                "{} cohort(s) and {} wave(s): a cohort × wave ANOVA needs at least two of each; check the `cohort` and \
                 `wave` columns",
                cohorts.len(),
                all_waves.len()
            ),
        });
    }
    // Per participant: cohort and the outcome at each wave.
    let mut seen: Seen = HashMap::new();
    let cohort_index: HashMap<&str, usize> = cohorts.iter().enumerate().map(|(i, c)| (c.as_str(), i)).collect();
    for r in 0..panel.n() {
        let g = cohort_index[cohort_of[r].as_str()];
        let entry = seen.entry(ids[r]).or_insert_with(|| (g, HashMap::new()));
        if entry.0 != g {
            return Err(bad(
                r,
                format!(
                    "participant '{}' is in cohort '{}' here and '{}' in an earlier row; a participant belongs to one cohort",
                    panel.id().label(r),
                    cohort_of[r],
                    cohorts[entry.0]
                ),
            ));
        }
        if entry.1.insert(wave_of[r].as_str(), (panel.outcome()[r], r)).is_some() {
            return Err(bad(
                r,
                format!(
                    "participant '{}' has wave '{}' twice; each wave once per participant (check the `wave` column)",
                    panel.id().label(r),
                    wave_of[r]
                ),
            ));
        }
    }
    // A wave seen once cannot carry a within-participant contrast.
    let mut wave_count: HashMap<&str, (usize, usize)> = HashMap::new();
    for (_, w) in seen.values() {
        for (label, (_, r)) in w {
            let e = wave_count.entry(label).or_insert((0, *r));
            e.0 += 1;
        }
    }
    if let Some((label, (_, r))) = wave_count.iter().find(|(_, (n, _))| *n < 2) {
        return Err(bad(
            *r,
            format!("wave '{label}' has a single participant; each wave needs several (check the `wave` column)"),
        ));
    }
    // The waves every cohort has.
    let mut per_cohort: Vec<BTreeSet<&str>> = vec![BTreeSet::new(); cohorts.len()];
    for (g, w) in seen.values() {
        per_cohort[*g].extend(w.keys().copied());
    }
    let common: BTreeSet<&str> = per_cohort
        .iter()
        .skip(1)
        .fold(per_cohort[0].clone(), |acc, s| acc.intersection(s).copied().collect());
    let waves = sorted(common);
    if per_cohort.iter().any(|s| s.len() != waves.len()) {
        let sets: Vec<String> = cohorts
            .iter()
            .zip(&per_cohort)
            .map(|(c, s)| format!("{c}: {}", sorted(s.clone()).join(", ")))
            .collect();
        warnings.push(Warning::new(
            WarningCode::UncommonWaves,
            format!(
                "the cohorts were not assessed at the same waves ({}); the ANOVA uses the waves they share: {}",
                sets.join("; "),
                if waves.is_empty() {
                    "none".into()
                } else {
                    waves.join(", ")
                }
            ),
        ));
    }
    if waves.len() < 2 {
        return Err(Error::Data {
            path: panel.source().to_path_buf(),
            message: "the cohorts share fewer than two waves, so no cohort × wave ANOVA can be formed; braid fit \
                      stitches cohorts that were assessed at different waves"
                .into(),
        });
    }
    complete_cases(panel, seen, cohorts, waves)
}

/// Participants with every analysed wave, in participant order, and the
/// baseline comparison of those left out.
fn complete_cases(panel: &Panel, seen: Seen<'_>, cohorts: Vec<String>, waves: Vec<String>) -> Result<Design> {
    let k = waves.len();
    let mut order: Vec<u32> = seen.keys().copied().collect();
    order.sort_unstable_by(|a, b| {
        label_order(
            panel.id().levels()[*a as usize].as_str(),
            &panel.id().levels()[*b as usize],
        )
    });
    let (mut y, mut age, mut cohort) = (Vec::new(), Vec::new(), Vec::new());
    let (mut kept_base, mut dropped_base) = (Vec::new(), Vec::new());
    for id in order {
        let (g, w) = &seen[&id];
        // The first observed outcome, by data row.
        let baseline = w.values().min_by_key(|(_, r)| *r).map(|(v, _)| *v);
        let row: Option<Vec<(f64, usize)>> = waves.iter().map(|wv| w.get(wv.as_str()).copied()).collect();
        match row {
            Some(r) => {
                y.extend(r.iter().map(|(v, _)| *v));
                age.extend(r.iter().map(|(_, row)| panel.age()[*row]));
                cohort.push(*g);
                kept_base.extend(baseline);
            }
            None => dropped_base.extend(baseline),
        }
    }
    let complete = Complete {
        y,
        age,
        k,
        cohort,
        groups: cohorts.len(),
    };
    let sizes = complete.sizes();
    if complete.n() == 0 {
        return Err(Error::Data {
            path: panel.source().to_path_buf(),
            message: format!(
                "no participant has every wave ({}); the ANOVA needs complete cases",
                waves.join(", ")
            ),
        });
    }
    if let Some(g) = sizes.iter().position(|&s| s < 2) {
        return Err(Error::Data {
            path: panel.source().to_path_buf(),
            message: format!(
                "cohort '{}' has {} participant(s) with every wave ({}); each cohort needs at least two",
                cohorts[g],
                sizes[g],
                waves.join(", ")
            ),
        });
    }
    let dropped = (!dropped_base.is_empty()).then(|| {
        let (mk, vk) = crate::stats::mean_var(&kept_base);
        let md = crate::stats::mean(&dropped_base);
        Dropped {
            kept_baseline_mean: mk,
            dropped_baseline_mean: md,
            standardized_difference: (md - mk) / vk.sqrt(),
        }
    });
    Ok(Design {
        complete,
        cohorts,
        waves,
        n_dropped: dropped_base.len(),
        dropped,
    })
}
