//! Just-identifying constraints and the solutions they pick on the line
//! b₀ + t·v, and the assumptions that bound the line.

use serde::Serialize;

use super::Dimension;
use super::analysis::{ApcData, DIMENSIONS, Labels, Term};
use super::identified::{Effects, dot, effects, slope_functional};
use crate::error::{Error, Result};

/// A just-identifying constraint.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Constraint {
    /// Two levels of one dimension have equal effects (1-based levels).
    Equal {
        /// Dimension.
        dimension: Dimension,
        /// First level.
        first: usize,
        /// Second level.
        second: usize,
    },
    /// The linear trend of one dimension is zero.
    ZeroSlope {
        /// Dimension.
        dimension: Dimension,
    },
    /// The minimum-norm solution in this coding.
    MinNorm,
}

impl Constraint {
    /// Parse `equal:DIM:L1,L2`, `zero-slope:DIM` or `min-norm`.
    ///
    /// # Errors
    /// [`Error::Spec`] naming `--constraint` for anything else.
    pub fn parse(s: &str) -> Result<Constraint> {
        let bad = |m: &str| Error::Spec {
            parameter: "constraint".into(),
            message: format!("'{s}': {m}; use equal:age:1,2, zero-slope:period or min-norm"),
        };
        let parts: Vec<&str> = s.trim().split(':').collect();
        match parts.as_slice() {
            ["min-norm"] => Ok(Constraint::MinNorm),
            ["zero-slope", d] => Ok(Constraint::ZeroSlope {
                dimension: Dimension::parse(d).ok_or_else(|| bad("unknown dimension"))?,
            }),
            ["equal", d, levels] => {
                let l: Vec<usize> = levels
                    .split(',')
                    .map(|x| x.trim().parse().map_err(|_| bad("levels must be whole numbers")))
                    .collect::<Result<_>>()?;
                if l.len() != 2 || l[0] == l[1] || l[0] == 0 || l[1] == 0 {
                    return Err(bad("give two different levels, counted from 1"));
                }
                Ok(Constraint::Equal {
                    dimension: Dimension::parse(d).ok_or_else(|| bad("unknown dimension"))?,
                    first: l[0],
                    second: l[1],
                })
            }
            _ => Err(bad("not a constraint")),
        }
    }

    /// In words.
    pub fn describe(&self, labels: &Labels) -> String {
        match self {
            Constraint::Equal {
                dimension,
                first,
                second,
            } => {
                let l = labels.of(*dimension);
                format!(
                    "{} effects of {} and {} are equal",
                    dimension.name(),
                    l.get(first - 1).cloned().unwrap_or_default(),
                    l.get(second - 1).cloned().unwrap_or_default()
                )
            }
            Constraint::ZeroSlope { dimension } => format!("the {} effects have no linear trend", dimension.name()),
            Constraint::MinNorm => "minimum norm, the intrinsic estimator (critique: Luo 2013)".into(),
        }
    }
}

/// An assumption for the bounds.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Assumption {
    /// A dimension's linear slope compared with a value: sense is ">=", "<=" or "=".
    Slope {
        /// Dimension.
        dimension: Dimension,
        /// ">=", "<=" or "=".
        sense: String,
        /// The value.
        value: f64,
    },
    /// A dimension's effects never decrease (or never increase).
    Monotone {
        /// Dimension.
        dimension: Dimension,
        /// True: never decrease.
        increasing: bool,
    },
}

impl Assumption {
    /// Parse `DIM-slope>=V`, `DIM-slope<=V`, `DIM-slope=V`, `DIM:nondecreasing`
    /// or `DIM:nonincreasing`.
    ///
    /// # Errors
    /// [`Error::Spec`] naming `--assume`.
    pub fn parse(s: &str) -> Result<Assumption> {
        let bad = |m: &str| Error::Spec {
            parameter: "assume".into(),
            message: format!("'{s}': {m}; use for example period-slope>=0 or cohort:nondecreasing"),
        };
        let t = s.trim();
        if let Some((d, m)) = t.split_once(':') {
            let dimension = Dimension::parse(d).ok_or_else(|| bad("unknown dimension"))?;
            return match m {
                "nondecreasing" => Ok(Assumption::Monotone {
                    dimension,
                    increasing: true,
                }),
                "nonincreasing" => Ok(Assumption::Monotone {
                    dimension,
                    increasing: false,
                }),
                _ => Err(bad("unknown shape")),
            };
        }
        for sense in [">=", "<=", "="] {
            if let Some((lhs, rhs)) = t.split_once(sense) {
                let d = lhs
                    .strip_suffix("-slope")
                    .ok_or_else(|| bad("the left side must be DIM-slope"))?;
                let dimension = Dimension::parse(d).ok_or_else(|| bad("unknown dimension"))?;
                let value: f64 = rhs.trim().parse().map_err(|_| bad("the right side must be a number"))?;
                if !value.is_finite() {
                    return Err(bad("the right side must be finite"));
                }
                return Ok(Assumption::Slope {
                    dimension,
                    sense: sense.to_string(),
                    value,
                });
            }
        }
        Err(bad("not an assumption"))
    }

    /// In words.
    pub fn describe(&self) -> String {
        match self {
            Assumption::Slope {
                dimension,
                sense,
                value,
            } => {
                let s = match sense.as_str() {
                    ">=" => "at least",
                    "<=" => "at most",
                    _ => "exactly",
                };
                format!("the {} slope is {s} {value}", dimension.name())
            }
            Assumption::Monotone { dimension, increasing } => format!(
                "the {} effects never {}",
                dimension.name(),
                if *increasing { "decrease" } else { "increase" }
            ),
        }
    }
}

/// One constrained solution: b₀ + t·v.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Solution {
    /// The constraint in words.
    pub constraint: String,
    /// The constraint as given.
    pub rule: Constraint,
    /// Its position on the line of solutions.
    pub t: f64,
    /// Level effects.
    pub effects: Effects,
    /// Linear slopes of the age, period and cohort effects (per group step).
    pub slopes: Vec<Term>,
}

/// The solution under each constraint (the default set when none is given).
pub(super) fn solutions(data: &ApcData, b0: &[f64], v: &[f64], constraints: &[Constraint]) -> Result<Vec<Solution>> {
    let s = data.shape;
    let q = s.n_params();
    let list: Vec<Constraint> = if constraints.is_empty() {
        vec![
            Constraint::Equal {
                dimension: Dimension::Age,
                first: 1,
                second: 2,
            },
            Constraint::Equal {
                dimension: Dimension::Cohort,
                first: 1,
                second: 2,
            },
            Constraint::ZeroSlope {
                dimension: Dimension::Period,
            },
            Constraint::MinNorm,
        ]
    } else {
        constraints.to_vec()
    };
    let vv = dot(v, v);
    let mut solutions = Vec::new();
    for c in &list {
        let t = match c {
            Constraint::MinNorm => -dot(b0, v) / vv,
            Constraint::ZeroSlope { dimension } => {
                let f = slope_functional(s, *dimension);
                solve_t(&f, b0, v, c, &data.labels)?
            }
            Constraint::Equal {
                dimension,
                first,
                second,
            } => {
                let rows = s.effect_rows(*dimension);
                if *first > rows.len() || *second > rows.len() {
                    return Err(Error::Spec {
                        parameter: "constraint".into(),
                        message: format!(
                            "{} has {} levels; level {} does not exist",
                            dimension.name(),
                            rows.len(),
                            first.max(second)
                        ),
                    });
                }
                let f: Vec<f64> = (0..q).map(|k| rows[first - 1][k] - rows[second - 1][k]).collect();
                solve_t(&f, b0, v, c, &data.labels)?
            }
        };
        let b: Vec<f64> = b0.iter().zip(v).map(|(x, y)| x + t * y).collect();
        solutions.push(Solution {
            constraint: c.describe(&data.labels),
            rule: c.clone(),
            t,
            effects: effects(s, &b),
            slopes: DIMENSIONS
                .iter()
                .map(|&d| Term {
                    term: d.name().into(),
                    value: dot(&slope_functional(s, d), &b),
                })
                .collect(),
        });
    }
    Ok(solutions)
}

fn solve_t(f: &[f64], b0: &[f64], v: &[f64], c: &Constraint, labels: &Labels) -> Result<f64> {
    let fv = dot(f, v);
    if fv.abs() < 1e-9 {
        return Err(Error::Spec {
            parameter: "constraint".into(),
            message: format!(
                "'{}' does not identify the model: it holds along the whole line of solutions",
                c.describe(labels)
            ),
        });
    }
    Ok(-dot(f, b0) / fv)
}
