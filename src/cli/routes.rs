//! How a user sets each option on the command line and in a study file.
//! The library names options by key; [`route`] and [`spell`] fill in the
//! command line's spelling for its messages.

/// The flag for a key, and the study file's table that holds it.
fn flag_and_table(key: &str) -> Option<(String, Option<&'static str>)> {
    let flag = |f: &str| format!("--{f}");
    let roles = Some("[roles]");
    Some(match key {
        "id" | "age" | "outcome" | "cohort" | "wave" | "cluster" | "period" | "birth_year" | "birth_date" | "date"
        | "wide_outcome" | "wide_age" | "wide_date" | "categorical" => (flag(&key.replace('_', "-")), roles),
        "covariates" => (flag("covariate"), roles),
        "delimiter" => (flag("delimiter"), Some("[data]")),
        "center" => (flag("center"), Some("[model]")),
        "degree" => (flag("degree"), Some("[model.age]")),
        "knots" => ("--knots or --knot-ages".to_string(), Some("[model.age]")),
        "events" | "exposure" | "width" | "constraint" | "assume" | "hierarchical" | "band" | "margin"
        | "margin_sd" | "reference_age" | "shared_ages" | "grid" | "at" | "cohort_width" | "cohort_from"
        | "wave_length" | "wave_from" | "shard" => (flag(&key.replace('_', "-")), None),
        "sphericity_alpha" => (flag("sphericity-level"), None),
        "items" | "reverse" | "anchor" | "scale_min" | "scale_max" | "min_answered" => {
            (flag(&key.replace('_', "-")), None)
        }
        _ => return None,
    })
}

/// The full route of a setting named at the head of a message.
pub fn route(key: &str) -> Option<String> {
    if let Some(field) = key.strip_prefix("simulation.") {
        let flag = match field {
            "replicates" | "precision" | "seed" | "route" => format!("--{field}"),
            _ => return None,
        };
        return Some(format!("{flag} (or `{field}` under [simulation] in the plan file)"));
    }
    let (flag, table) = flag_and_table(key)?;
    Some(match table {
        Some(t) => format!("{flag} (or `{key}` under {t} in the study file)"),
        None => flag,
    })
}

/// The short spelling of a setting named inside a message.
pub fn spell(key: &str) -> Option<String> {
    flag_and_table(key).map(|(flag, _)| flag)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Every key the library names has a spelling here (common practice: a
    // message that names an option the user cannot find is a dead end).
    #[test]
    fn library_keys_have_routes() {
        for key in [
            "id",
            "age",
            "outcome",
            "birth_date",
            "covariates",
            "degree",
            "knots",
            "band",
            "width",
            "sphericity_alpha",
        ] {
            assert!(route(key).is_some(), "{key}");
        }
        assert_eq!(spell("birth_year").as_deref(), Some("--birth-year"));
        assert_eq!(
            route("degree").as_deref(),
            Some("--degree (or `degree` under [model.age] in the study file)")
        );
    }
}
