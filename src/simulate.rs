//! Seeded generator of invented cohort-sequential studies with a known truth,
//! for the demo, the tests, the examples and planning.
//!
//! The generator draws, for each participant, a random intercept and age
//! slope from a bivariate normal, adds a school intercept and independent
//! residuals, and applies monotone dropout and intermittent missed waves.
//! Random numbers come from xoshiro256** (Blackman & Vigna 2021, *ACM Trans.
//! Math. Softw.* 47) seeded through SplitMix64, with normals by the polar
//! Box–Muller method, so every run with the same seed is identical on every
//! platform.

use serde::{Deserialize, Serialize};

use crate::data::{Calendar, CalendarSource, Codes, DropReport, Panel, Roles};

/// A small deterministic random-number generator (xoshiro256**).
#[derive(Debug, Clone)]
pub struct Rng {
    s: [u64; 4],
    spare: Option<f64>,
}

impl Rng {
    /// Seed the generator (SplitMix64 expands the seed to the state).
    pub fn new(seed: u64) -> Rng {
        let mut z = seed;
        let mut next = || {
            z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut x = z;
            x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            x ^ (x >> 31)
        };
        Rng {
            s: [next(), next(), next(), next()],
            spare: None,
        }
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        let result = self.s[1].wrapping_mul(5).rotate_left(7).wrapping_mul(9);
        let t = self.s[1] << 17;
        self.s[2] ^= self.s[0];
        self.s[3] ^= self.s[1];
        self.s[1] ^= self.s[2];
        self.s[0] ^= self.s[3];
        self.s[2] ^= t;
        self.s[3] = self.s[3].rotate_left(45);
        result
    }

    /// A uniform draw on [0, 1).
    pub fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// A standard normal draw.
    pub fn normal(&mut self) -> f64 {
        if let Some(v) = self.spare.take() {
            return v;
        }
        loop {
            let u = 2.0 * self.uniform() - 1.0;
            let v = 2.0 * self.uniform() - 1.0;
            let s = u * u + v * v;
            if s > 0.0 && s < 1.0 {
                let f = (-2.0 * s.ln() / s).sqrt();
                self.spare = Some(v * f);
                return u * f;
            }
        }
    }
}

fn no_slope(sd: &f64) -> bool {
    *sd == 0.0
}

/// The invented truth behind a simulated study.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Truth {
    /// Centre age of the mean polynomial.
    pub center: f64,
    /// Mean polynomial coefficients in (age − centre): intercept, linear, quadratic, ...
    pub mean: Vec<f64>,
    /// SD of participants' intercepts at the centre age.
    pub sd_intercept: f64,
    /// SD of participants' age slopes (per year).
    pub sd_slope: f64,
    /// Correlation of intercept and slope.
    pub correlation: f64,
    /// SD of school intercepts (0 for no clustering).
    pub sd_school: f64,
    /// SD of school age slopes, independent of the school intercepts (0:
    /// none; drawn from their own stream, so the rest of a simulation is
    /// the same with or without them).
    #[serde(default, skip_serializing_if = "no_slope")]
    pub sd_school_slope: f64,
    /// Residual SD.
    pub sd_residual: f64,
    /// A shift of the whole trajectory per cohort, in `Design::entry_ages`
    /// order (empty: cohorts converge, no shift).
    #[serde(default)]
    pub cohort_shift: Vec<f64>,
    /// Added to every assessment after a participant's first (a retest
    /// effect; 0 for none).
    #[serde(default)]
    pub retest: f64,
    /// A shift of every assessment from a calendar time on (none when absent).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub period_shock: Option<PeriodShock>,
}

/// A period shock: every assessment at or after `from_year` years since the
/// first wave is shifted by `size`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PeriodShock {
    /// Years since the first wave at which the shock starts.
    pub from_year: f64,
    /// The shift, in outcome units.
    pub size: f64,
}

/// How a simulation draws its random numbers.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Streams {
    /// One sequence for the whole study (the demo's).
    #[default]
    Single,
    /// One sequence per cohort and one for the clusters, so that the first n
    /// participants of a cohort are the same for every n: common random
    /// numbers across sample sizes, for planning.
    PerCohort,
}

impl Truth {
    /// The true mean at `age`.
    pub fn mean_at(&self, age: f64) -> f64 {
        let a = age - self.center;
        self.mean.iter().enumerate().map(|(k, b)| b * a.powi(k as i32)).sum()
    }
}

/// A cohort-sequential design to simulate.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Design {
    /// Seed of the random-number generator.
    pub seed: u64,
    /// Age of each cohort at its first wave.
    pub entry_ages: Vec<f64>,
    /// Participants recruited per cohort.
    pub per_cohort: usize,
    /// Number of waves.
    pub waves: usize,
    /// Years between waves.
    pub wave_gap: f64,
    /// Calendar year of the first wave.
    pub first_year: i32,
    /// Number of schools (participants are spread over them at random).
    pub schools: usize,
    /// Probability of leaving the study after each wave (monotone dropout).
    pub dropout: f64,
    /// Probability of missing a later wave while staying in the study.
    pub skip: f64,
    /// The truth.
    pub truth: Truth,
    /// Wave times in years since the first wave (empty: `waves` waves
    /// `wave_gap` apart).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub wave_times: Vec<f64>,
    /// Width of the uniform spread of entry ages around each cohort's entry
    /// age, years.
    #[serde(default = "default_age_spread")]
    pub age_spread: f64,
    /// Width of the uniform jitter of each assessment around its wave time, years.
    #[serde(default = "default_jitter")]
    pub jitter: f64,
    /// How random numbers are drawn.
    #[serde(default)]
    pub streams: Streams,
}

fn default_age_spread() -> f64 {
    1.0
}

fn default_jitter() -> f64 {
    0.2
}

impl Design {
    /// The demo study: five cohorts entering at ages 12 to 20, followed for
    /// four annual waves in 24 schools (an invented scenario; see README).
    pub fn demo() -> Design {
        Design {
            seed: 20_261_201,
            entry_ages: vec![12.0, 14.0, 16.0, 18.0, 20.0],
            per_cohort: 240,
            waves: 4,
            wave_gap: 1.0,
            first_year: 2031,
            schools: 24,
            dropout: 0.08,
            skip: 0.05,
            truth: Truth {
                center: 16.0,
                mean: vec![50.0, 1.6, -0.12],
                sd_intercept: 5.0,
                sd_slope: 0.6,
                correlation: 0.3,
                sd_school: 2.0,
                sd_school_slope: 0.0,
                sd_residual: 3.0,
                cohort_shift: Vec::new(),
                retest: 0.0,
                period_shock: None,
            },
            wave_times: Vec::new(),
            age_spread: default_age_spread(),
            jitter: default_jitter(),
            streams: Streams::Single,
        }
    }

    /// The wave times in years since the first wave.
    pub fn offsets(&self) -> Vec<f64> {
        if self.wave_times.is_empty() {
            (0..self.waves).map(|w| w as f64 * self.wave_gap).collect()
        } else {
            self.wave_times.clone()
        }
    }
}

/// One simulated assessment.
#[derive(Debug, Clone, PartialEq)]
pub struct SimRow {
    /// Participant label.
    pub id: String,
    /// School label.
    pub school: String,
    /// Cohort label (entry age).
    pub cohort: String,
    /// Wave number, from 1.
    pub wave: usize,
    /// Calendar time of the assessment as a decimal year.
    pub year: f64,
    /// Exact age, years.
    pub age: f64,
    /// Outcome.
    pub score: f64,
}

/// Each wave's fieldwork centres on this share of the calendar year (autumn).
const FIELDWORK_START: f64 = 0.75;

/// A simulated study.
#[derive(Debug, Clone)]
pub struct Simulated {
    /// The design it came from.
    pub design: Design,
    /// One row per assessment.
    pub rows: Vec<SimRow>,
}

/// Simulate a study from a design.
pub fn simulate(design: &Design) -> Simulated {
    let mut rng = Rng::new(design.seed);
    let schools = design.schools.max(1);
    let t = &design.truth;
    let mut school_effect = Vec::with_capacity(schools);
    for _ in 0..schools {
        school_effect.push(t.sd_school * rng.normal());
    }
    let school_slope: Vec<f64> = if t.sd_school_slope > 0.0 {
        let mut own = Rng::new(stream_seed(design.seed, u64::MAX));
        (0..schools).map(|_| t.sd_school_slope * own.normal()).collect()
    } else {
        Vec::new()
    };
    let offsets = design.offsets();
    let mut rows = Vec::new();
    for (c, &entry) in design.entry_ages.iter().enumerate() {
        let mut own;
        let rng = match design.streams {
            Streams::Single => &mut rng,
            Streams::PerCohort => {
                own = Rng::new(stream_seed(design.seed, c as u64 + 1));
                &mut own
            }
        };
        let shift = t.cohort_shift.get(c).copied().unwrap_or(0.0);
        for k in 0..design.per_cohort {
            let serial = match design.streams {
                Streams::Single => c * design.per_cohort + k + 1,
                Streams::PerCohort => (c + 1) * 1_000_000 + k + 1,
            };
            let who = Participant {
                id: format!("P{serial:06}"),
                entry,
                shift,
            };
            who.assessments(design, &offsets, (&school_effect, &school_slope), rng, &mut rows);
        }
    }
    Simulated {
        design: design.clone(),
        rows,
    }
}

/// The seed of stream `k` of a simulation seeded with `seed` (SplitMix64 of
/// the pair, so streams do not overlap in practice).
pub fn stream_seed(seed: u64, k: u64) -> u64 {
    let mut rng = Rng::new(seed ^ k.wrapping_mul(0xD1B5_4A32_D192_ED03));
    rng.next_u64()
}

/// One simulated participant before their assessments are drawn.
struct Participant {
    id: String,
    entry: f64,
    shift: f64,
}

impl Participant {
    /// Draw this participant's school, random effects, dropout and
    /// assessments, in the order the demo has always used.
    fn assessments(
        &self,
        design: &Design,
        offsets: &[f64],
        (school_effect, school_slope): (&[f64], &[f64]),
        rng: &mut Rng,
        rows: &mut Vec<SimRow>,
    ) {
        let t = &design.truth;
        let schools = school_effect.len();
        let rho = t.correlation.clamp(-1.0, 1.0);
        let school = (rng.uniform() * schools as f64) as usize % schools;
        let (z1, z2) = (rng.normal(), rng.normal());
        let b0 = t.sd_intercept * z1;
        let b1 = t.sd_slope * (rho * z1 + (1.0 - rho * rho).sqrt() * z2);
        // Written so that a spread of 1 gives the demo's ages bit for bit.
        let age0 = self.entry + design.age_spread * rng.uniform() - design.age_spread / 2.0;
        let mut present = true;
        let mut seen = 0usize;
        for (w, &time) in offsets.iter().enumerate() {
            if w > 0 && rng.uniform() < design.dropout {
                present = false;
            }
            if !present {
                break;
            }
            let missed = w > 0 && rng.uniform() < design.skip;
            let offset = time + design.jitter * (rng.uniform() - 0.5);
            let age = age0 + offset;
            let e = t.sd_residual * rng.normal();
            if missed {
                continue;
            }
            let retest = if seen > 0 { t.retest } else { 0.0 };
            let shock = t.period_shock.filter(|p| offset >= p.from_year).map_or(0.0, |p| p.size);
            seen += 1;
            let mut score =
                t.mean_at(age) + self.shift + b0 + b1 * (age - t.center) + school_effect[school] + e + retest + shock;
            if let Some(slope) = school_slope.get(school) {
                score += slope * (age - t.center);
            }
            rows.push(SimRow {
                id: self.id.clone(),
                school: format!("S{:02}", school + 1),
                cohort: format!("{}", self.entry),
                wave: w + 1,
                year: f64::from(design.first_year) + FIELDWORK_START + offset,
                age,
                score,
            });
        }
    }
}

impl Simulated {
    /// The column roles of a simulated file.
    pub fn roles(with_school: bool) -> Roles {
        Roles {
            id: "pupil".into(),
            age: "age".into(),
            outcome: "score".into(),
            birth_date: None,
            date: None,
            wide_outcome: vec![],
            wide_age: vec![],
            wide_date: vec![],
            cohort: Some("cohort".into()),
            wave: Some("wave".into()),
            cluster: if with_school { Some("school".into()) } else { None },
            period: Some("year".into()),
            birth_year: None,
            covariates: vec![],
            categorical: vec![],
        }
    }

    /// The study as a validated panel, without a file.
    pub fn panel(&self, with_school: bool) -> Panel {
        let ids: Vec<String> = self.rows.iter().map(|r| r.id.clone()).collect();
        let cohorts: Vec<String> = self.rows.iter().map(|r| r.cohort.clone()).collect();
        let waves: Vec<String> = self.rows.iter().map(|r| r.wave.to_string()).collect();
        let schools: Vec<String> = self.rows.iter().map(|r| r.school.clone()).collect();
        Panel {
            source: "simulated".into(),
            roles: Self::roles(with_school),
            n_rows_read: self.rows.len(),
            dropped: DropReport::default(),
            row: (1..=self.rows.len()).collect(),
            id: Codes::new(&ids, false),
            age: self.rows.iter().map(|r| r.age).collect(),
            outcome: self.rows.iter().map(|r| r.score).collect(),
            cohort: Some(Codes::new(&cohorts, true)),
            wave: Some(Codes::new(&waves, true)),
            cluster: if with_school {
                Some(Codes::new(&schools, true))
            } else {
                None
            },
            covariates: Vec::new(),
            calendar: Some(Calendar {
                period: self.rows.iter().map(|r| r.year).collect(),
                birth: self.rows.iter().map(|r| r.year - r.age).collect(),
                source: CalendarSource::BirthFromPeriod,
            }),
        }
    }

    /// The header and text rows of the file form: pupil, school, cohort, wave, year, age, score.
    pub fn table(&self) -> (Vec<&'static str>, Vec<Vec<String>>) {
        let header = vec!["pupil", "school", "cohort", "wave", "year", "age", "score"];
        let rows = self
            .rows
            .iter()
            .map(|r| {
                vec![
                    r.id.clone(),
                    r.school.clone(),
                    r.cohort.clone(),
                    r.wave.to_string(),
                    format!("{:.4}", r.year),
                    format!("{:.4}", r.age),
                    format!("{:.3}", r.score),
                ]
            })
            .collect();
        (header, rows)
    }
}

/// Complete cohort × wave data with no cohort, wave or interaction effect:
/// cohorts of `sizes` participants, `k` waves, normal errors with the k × k
/// covariance `cov` (row-major) around a mean of 50. For measuring the size
/// of the mixed ANOVA's tests.
///
/// # Panics
/// When `cov` is not positive definite (a programming error of the caller).
pub fn complete_waves(sizes: &[usize], k: usize, cov: &[f64], seed: u64) -> crate::anova::Complete {
    let l = crate::stats::small_cholesky(cov, k).expect("the covariance is not positive definite");
    let mut rng = Rng::new(seed);
    let (mut y, mut cohort) = (Vec::new(), Vec::new());
    for (g, &n) in sizes.iter().enumerate() {
        for _ in 0..n {
            let z: Vec<f64> = (0..k).map(|_| rng.normal()).collect();
            for i in 0..k {
                y.push(50.0 + (0..=i).map(|j| l[i * k + j] * z[j]).sum::<f64>());
            }
            cohort.push(g);
        }
    }
    crate::anova::Complete {
        age: vec![0.0; y.len()],
        y,
        k,
        cohort,
        groups: sizes.len(),
    }
}
