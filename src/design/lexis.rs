//! The Lexis diagram's data: a sample of lifelines per cohort, in calendar
//! time when the file has it, else in time since the first assessment.

use super::DesignReport;
use crate::data::Panel;

/// At most this many lifelines per cohort in the Lexis diagram, chosen evenly
/// through the participants in file order.
pub const LIFELINES_PER_COHORT: usize = 60;

/// One cohort's lifelines: (time, age) points in time order.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LexisCohort {
    /// Cohort label.
    pub cohort: String,
    /// Participants in the cohort.
    pub n_participants: usize,
    /// Sampled lifelines.
    pub lines: Vec<Vec<(f64, f64)>>,
}

/// What the Lexis diagram draws.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LexisData {
    /// Horizontal axis title.
    pub time_label: String,
    /// Vertical axis title: the age column and its unit.
    pub age_label: String,
    /// Whether times are calendar years (then birth-year diagonals are drawn).
    pub calendar: bool,
    /// Cohorts in order of their youngest age.
    pub cohorts: Vec<LexisCohort>,
}

/// Collect the Lexis diagram's lifelines from a panel and its design report
/// (whose cohort labels, in row order, are `cohort_of`).
pub fn lexis_data(panel: &Panel, report: &DesignReport, cohort_of: &[String]) -> LexisData {
    let n_id = panel.id.n_levels();
    let first = panel.first_ages();
    let time = |r: usize| match &panel.calendar {
        Some(c) => c.period[r],
        None => panel.age[r] - first[panel.id.codes[r] as usize],
    };
    // Participants of each cohort, in order of first appearance.
    let mut order: Vec<&str> = report.cohorts.iter().map(|c| c.cohort.as_str()).collect();
    order.sort_by(|a, b| {
        let age = |l: &str| report.cohorts.iter().find(|c| c.cohort == l).map_or(0.0, |c| c.age_min);
        age(a).total_cmp(&age(b))
    });
    let mut members: Vec<Vec<u32>> = vec![Vec::new(); order.len()];
    let mut cohort_of_person: Vec<usize> = vec![usize::MAX; n_id];
    for (r, c) in cohort_of.iter().enumerate() {
        let k = panel.id.codes[r] as usize;
        // Every label is one of the report's cohorts; a label that were not
        // would leave its participant out of the figure rather than misfile it.
        if cohort_of_person[k] == usize::MAX
            && let Some(j) = order.iter().position(|o| o == c)
        {
            cohort_of_person[k] = j;
            members[j].push(k as u32);
        }
    }
    let mut slot: Vec<Option<(usize, usize)>> = vec![None; n_id];
    let mut cohorts: Vec<LexisCohort> = Vec::with_capacity(order.len());
    for (j, m) in members.iter().enumerate() {
        let take = m.len().min(LIFELINES_PER_COHORT);
        for i in 0..take {
            let who = m[i * m.len() / take] as usize;
            slot[who] = Some((j, i));
        }
        cohorts.push(LexisCohort {
            cohort: order[j].to_string(),
            n_participants: m.len(),
            lines: vec![Vec::new(); take],
        });
    }
    for r in 0..panel.n() {
        if let Some((j, i)) = slot[panel.id.codes[r] as usize] {
            cohorts[j].lines[i].push((time(r), panel.age[r]));
        }
    }
    for c in &mut cohorts {
        for l in &mut c.lines {
            l.sort_by(|a, b| a.0.total_cmp(&b.0));
        }
    }
    LexisData {
        time_label: match &panel.calendar {
            Some(c) => format!("calendar year of assessment (from {})", c.source.describe()),
            None => "years since the participant's first assessment (no calendar times in the file)".into(),
        },
        age_label: format!("{} (years)", panel.roles.age),
        calendar: panel.calendar.is_some(),
        cohorts,
    }
}
