//! t quantiles, which every interval braid reports rests on, against scipy
//! (version in tests/reference/t_quantiles.json, made by
//! tests/reference/t_quantile_reference.py) and against closed forms.

use braid::infer::{t_cdf, t_quantile, t_sf};

use crate::tolerance::{T_QUANTILE_REL, T_ROUND_TRIP_ABS, T_TAIL_REL, rel};

/// The three named numbers of each entry of the reference's list `list`
/// (at least 100 entries).
fn scipy(list: &str, fields: [&str; 3]) -> Vec<[f64; 3]> {
    let reference = crate::common::reference_json("t_quantiles.json");
    let entries = reference[list].as_array().unwrap();
    assert!(entries.len() >= 100, "{list}: {} entries", entries.len());
    entries.iter().map(|e| fields.map(|f| e[f].as_f64().unwrap())).collect()
}

// scipy.stats.t.ppf at df from 1 to just below the switch to the normal,
// including the large df at which statrs' own inverse drifts.
#[test]
fn t_quantiles_match_scipy_at_every_df() {
    for [df, prob, want] in scipy("cases", ["df", "prob", "quantile"]) {
        let got = t_quantile(prob, df);
        assert!(
            rel(got, want, 1e-3) < T_QUANTILE_REL,
            "df {df}, probability {prob}: {got} against scipy's {want}"
        );
    }
}

// Closed forms: with 1 df (Cauchy) the quantile is tan(π(p − ½)); with 2 df
// it is (2p − 1)/√(2p(1 − p)) (Johnson, Kotz & Balakrishnan 1995,
// *Continuous Univariate Distributions* 2, ch. 28). And on a fine grid of
// large df the quantile's probability is the one asked for.
#[test]
fn t_quantiles_meet_closed_forms_and_invert_the_distribution_function() {
    for prob in [0.6, 0.9, 0.975, 0.995, 0.025] {
        let cauchy = (std::f64::consts::PI * (prob - 0.5)).tan();
        assert!(
            rel(t_quantile(prob, 1.0), cauchy, 1e-3) < T_QUANTILE_REL,
            "df 1, probability {prob}"
        );
        let two = (2.0 * prob - 1.0) / (2.0 * prob * (1.0 - prob)).sqrt();
        assert!(
            rel(t_quantile(prob, 2.0), two, 1e-3) < T_QUANTILE_REL,
            "df 2, probability {prob}"
        );
    }
    let mut df = 1e3;
    while df < 1e7 {
        for prob in [0.975, 0.9] {
            let q = t_quantile(prob, df);
            assert!(
                (t_cdf(q, df) - prob).abs() < T_ROUND_TRIP_ABS,
                "df {df}, probability {prob}: {q}"
            );
        }
        df *= 1.05;
    }
}

// The tails behind every p-value (braid's two-sided p-value is twice the
// upper tail) against scipy.stats.t.cdf, down to 1e-89, relative.
#[test]
fn t_tails_match_scipy_at_every_df() {
    for [df, x, want] in scipy("tails", ["df", "x", "lower_tail"]) {
        let got = t_sf(x, df);
        assert!(
            want > 0.0 && (got - want).abs() <= T_TAIL_REL * want,
            "df {df}, x {x}: {got} against scipy's {want}"
        );
    }
}
