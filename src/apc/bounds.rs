//! Bounds on the line of solutions from sign and shape assumptions.

use serde::Serialize;

use super::Dimension;
use super::Shape;
use super::analysis::DIMENSIONS;
use super::constraints::Assumption;
use super::identified::{dot, slope_functional};

/// The bounds that sign or shape assumptions allow.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Bounds {
    /// The assumptions in words.
    pub assumptions: Vec<String>,
    /// Whether they contradict the data (no t satisfies them all).
    pub contradiction: bool,
    /// The interval of t they allow (infinite ends are null).
    pub t_from: Option<f64>,
    /// Upper end.
    pub t_to: Option<f64>,
    /// Bounds on each linear slope (null ends are unbounded).
    pub slopes: Vec<SlopeBound>,
}

/// Bounds on one slope.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SlopeBound {
    /// Dimension.
    pub dimension: Dimension,
    /// Lowest allowed value.
    pub from: Option<f64>,
    /// Highest allowed value.
    pub to: Option<f64>,
}

/// The interval of t that the assumptions allow, and the slopes' bounds.
pub(super) fn bounds(s: Shape, b0: &[f64], v: &[f64], assumptions: &[Assumption]) -> Bounds {
    // Each assumption: g(t) = g0 + t·gv compared with a value.
    let mut lo = f64::NEG_INFINITY;
    let mut hi = f64::INFINITY;
    let mut contradiction = false;
    let mut apply = |g0: f64, gv: f64, sense: &str, value: f64| {
        let r = value - g0;
        const FLAT: f64 = 1e-12;
        if gv.abs() < FLAT {
            let holds = match sense {
                ">=" => g0 >= value - 1e-12,
                "<=" => g0 <= value + 1e-12,
                _ => (g0 - value).abs() <= 1e-9,
            };
            contradiction |= !holds;
            return;
        }
        let t = r / gv;
        match (sense, gv > 0.0) {
            (">=", true) | ("<=", false) => lo = lo.max(t),
            (">=", false) | ("<=", true) => hi = hi.min(t),
            _ => {
                lo = lo.max(t);
                hi = hi.min(t);
            }
        }
    };
    for a in assumptions {
        match a {
            Assumption::Slope {
                dimension,
                sense,
                value,
            } => {
                let f = slope_functional(s, *dimension);
                apply(dot(&f, b0), dot(&f, v), sense, *value);
            }
            Assumption::Monotone { dimension, increasing } => {
                let rows = s.effect_rows(*dimension);
                for l in 0..rows.len() - 1 {
                    let f: Vec<f64> = rows[l + 1].iter().zip(&rows[l]).map(|(x, y)| x - y).collect();
                    apply(dot(&f, b0), dot(&f, v), if *increasing { ">=" } else { "<=" }, 0.0);
                }
            }
        }
    }
    if lo > hi + 1e-9 * (1.0 + lo.abs().max(hi.abs())) {
        contradiction = true;
    }
    let finite = |x: f64| if x.is_finite() { Some(x) } else { None };
    let slopes = DIMENSIONS
        .iter()
        .map(|&d| {
            let f = slope_functional(s, d);
            let (g0, gv) = (dot(&f, b0), dot(&f, v));
            let ends = [g0 + lo * gv, g0 + hi * gv];
            let (mut from, mut to) = (ends[0].min(ends[1]), ends[0].max(ends[1]));
            if gv.abs() < 1e-12 {
                from = g0;
                to = g0;
            }
            SlopeBound {
                dimension: d,
                from: if contradiction { None } else { finite(from) },
                to: if contradiction { None } else { finite(to) },
            }
        })
        .collect();
    Bounds {
        assumptions: assumptions.iter().map(Assumption::describe).collect(),
        contradiction,
        t_from: if contradiction { None } else { finite(lo) },
        t_to: if contradiction { None } else { finite(hi) },
        slopes,
    }
}
