//! What every report can do for the one emitter: render its text screen,
//! and write its JSON and its files into an output folder.

use std::path::Path;

use serde::Serialize;

use super::{apc_figure, converge_figure, design_figure, figure, text, write_json, write_trajectory_csv};
use crate::anova::AnovaReport;
use crate::apc::analysis::ApcReport;
use crate::design::DesignReport;
use crate::error::Result;
use crate::linkage::ConvergeReport;
use crate::report::FitReport;
use crate::score::ScoreReport;

/// A self-describing report: everything needed to render it is inside.
pub trait Render: Serialize {
    /// The name of its JSON document in an output folder (`fit.json`).
    const JSON_FILE: &'static str;

    /// The text screen.
    fn text(&self) -> String;

    /// Write the figures and tables that go beside the JSON into `dir`,
    /// which exists; returns the file names, in the order written.
    ///
    /// # Errors
    /// [`crate::Error::Output`] when a file cannot be written.
    fn write_files(&self, dir: &Path) -> Result<Vec<String>>;

    /// Write the JSON document and every file into `dir`, which exists;
    /// returns the file names.
    ///
    /// # Errors
    /// [`crate::Error::Output`] when a file cannot be written.
    fn write_folder(&self, dir: &Path) -> Result<Vec<String>> {
        write_json(&dir.join(Self::JSON_FILE), self)?;
        let mut names = vec![Self::JSON_FILE.to_string()];
        names.extend(self.write_files(dir)?);
        Ok(names)
    }
}

impl Render for FitReport {
    const JSON_FILE: &'static str = "fit.json";

    fn text(&self) -> String {
        text::fit_summary(self, self.truth.as_deref())
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        write_trajectory_csv(&dir.join("trajectory.csv"), &self.trajectory)?;
        figure::trajectory_png(&dir.join("trajectory.png"), self, &self.paths)?;
        figure::trajectory_svg(&dir.join("trajectory.svg"), self, &self.paths)?;
        let mut names: Vec<String> = ["trajectory.csv", "trajectory.png", "trajectory.svg"]
            .map(String::from)
            .to_vec();
        if let Some(p) = &self.predictions {
            names.extend(p.write(dir)?);
        }
        Ok(names)
    }
}

impl Render for DesignReport {
    const JSON_FILE: &'static str = "design.json";

    fn text(&self) -> String {
        text::design_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        design_figure::lexis(&dir.join("lexis.png"), &dir.join("lexis.svg"), &self.lexis)?;
        design_figure::coverage(&dir.join("coverage.png"), &dir.join("coverage.svg"), self)?;
        Ok(["lexis.png", "lexis.svg", "coverage.png", "coverage.svg"]
            .map(String::from)
            .to_vec())
    }
}

impl Render for ConvergeReport {
    const JSON_FILE: &'static str = "converge.json";

    fn text(&self) -> String {
        text::converge_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        converge_figure::shared_ages(&dir.join("shared_ages.png"), &dir.join("shared_ages.svg"), self)?;
        Ok(vec!["shared_ages.png".into(), "shared_ages.svg".into()])
    }
}

impl Render for AnovaReport {
    const JSON_FILE: &'static str = "anova.json";

    fn text(&self) -> String {
        text::anova_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        super::anova_figure::means_csv(&dir.join("anova_means.csv"), self)?;
        super::anova_figure::means(&dir.join("anova_means.png"), &dir.join("anova_means.svg"), self)?;
        Ok(["anova_means.csv", "anova_means.png", "anova_means.svg"]
            .map(String::from)
            .to_vec())
    }
}

impl Render for ScoreReport {
    const JSON_FILE: &'static str = "score.json";

    fn text(&self) -> String {
        text::score_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        let mut s = self.score_header.join(",");
        s.push('\n');
        for row in &self.scores {
            s.push_str(&row.labels);
            if row.score.is_finite() {
                s.push_str(&format!(",{},{}\n", row.score, row.n_answered));
            } else {
                s.push_str(&format!(",,{}\n", row.n_answered));
            }
        }
        super::write_text(&dir.join("scores.csv"), &s)?;
        super::score_figure::reliability(&dir.join("reliability.png"), &dir.join("reliability.svg"), self)?;
        Ok(["scores.csv", "reliability.png", "reliability.svg"]
            .map(String::from)
            .to_vec())
    }
}

impl Render for ApcReport {
    const JSON_FILE: &'static str = "apc.json";

    fn text(&self) -> String {
        text::apc_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        apc_figure::write(dir, self)
    }
}

impl Render for crate::plan::PlanReport {
    const JSON_FILE: &'static str = crate::plan::JSON_FILE;

    fn text(&self) -> String {
        text::plan_summary(self)
    }

    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        super::plan_figure::figures(dir, self)
    }
}

impl Render for crate::plan::shard::ShardOutput {
    const JSON_FILE: &'static str = crate::plan::shard::JSON_FILE;

    fn text(&self) -> String {
        let replicates: usize = self.evaluations.iter().map(|e| e.outcomes.len()).sum();
        format!(
            "braid plan · shard {} of {}: {} replicates over {} evaluations (design × n); merge every shard's {} to read the plan\n",
            self.shard.k,
            self.shard.n,
            replicates,
            self.evaluations.len(),
            Self::JSON_FILE
        )
    }

    fn write_files(&self, _dir: &Path) -> Result<Vec<String>> {
        Ok(Vec::new())
    }
}

impl Render for crate::study::StudyReport {
    const JSON_FILE: &'static str = "report.json";

    fn text(&self) -> String {
        text::study_summary(self)
    }

    /// Every analysis's JSON and figures, then the page that gathers them.
    fn write_files(&self, dir: &Path) -> Result<Vec<String>> {
        let mut names = self.design.write_folder(dir)?;
        if let Some(c) = &self.converge {
            names.extend(c.write_folder(dir)?);
        }
        names.extend(self.fit.write_folder(dir)?);
        let mut apc_figures = Vec::new();
        if let Some(a) = &self.apc {
            let written = a.write_folder(dir)?;
            apc_figures = written.iter().filter(|n| n.ends_with(".svg")).cloned().collect();
            names.extend(written);
        }
        if let Some(a) = &self.anova {
            names.extend(a.write_folder(dir)?);
        }
        if let Some(s) = &self.score {
            names.extend(s.write_folder(dir)?);
        }
        super::html::write_page(dir, self, &apc_figures)?;
        names.push(super::html::PAGE.to_string());
        Ok(names)
    }
}
