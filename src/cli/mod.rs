//! The command line: flags → validated config → one pipeline function.
//!
//! [`run`] reads as the architecture: load, specify, fit, infer, report.

pub mod args;
pub mod config;

use std::path::Path;

use clap::Parser;

use crate::data::{self, Panel};
use crate::error::{Error, Result};
use crate::report::{self, figure::Line, text};
use crate::simulate::{self, Design};
use crate::spec::{AgeSpec, ModelSpec, RandomSpec};
use args::{Cli, Command, DemoArgs};
use config::{DataSection, FitConfig, Study};

/// Parse the process arguments and run; returns the exit code.
pub fn main_exit_code() -> i32 {
    quiet_decoder_panics();
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            if !e.use_stderr() {
                // --help and --version print in full.
                let _ = e.print();
                return 0;
            }
            // Usage errors in one line, like every other error.
            let text = e.render().to_string();
            let first = text
                .lines()
                .find(|l| !l.trim().is_empty())
                .unwrap_or("invalid arguments");
            let first = first.trim_start_matches("error: ");
            eprintln!("braid: error: {first} (see braid --help)");
            return 2;
        }
    };
    match run(cli) {
        Ok(()) => 0,
        Err(e) => {
            eprintln!("braid: error: {}", e.to_string().replace(['\n', '\r'], " "));
            e.exit_code()
        }
    }
}

/// The Parquet decoder panics on some damaged files; braid catches that and
/// reports a one-line error, so the default panic message is silenced for
/// panics inside a guarded read (and only there).
fn quiet_decoder_panics() {
    let default = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        if !data::read::in_parquet_read() {
            default(info);
        }
    }));
}

/// Run one parsed command.
///
/// # Errors
/// Any [`Error`] of the pipeline, for the binary to print.
pub fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Fit(a) => fit_command(&FitConfig::from_args(&a)?),
        Command::Demo(a) => demo_command(&a),
        Command::Inspect(a) => inspect_command(&a),
        Command::Converge(a) => converge_command(&a),
        Command::Apc(a) => apc_command(&a),
    }
}

/// `braid fit`: load, specify, fit, infer, report.
fn fit_command(config: &FitConfig) -> Result<()> {
    if let Some(dir) = &config.out {
        report::check_output(dir, true, config.force, "--out")?;
    }
    if let Some(file) = &config.json {
        report::check_output(file, false, config.force, "--json")?;
    }
    let panel = data::load(&config.data, &config.roles, config.read)?;
    let analysis = crate::fit_panel(&panel, &config.model, &config.trajectory)?;
    if !config.quiet {
        print!("{}", text::fit_summary(&analysis.report, None));
    }
    if let Some(path) = &config.json {
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            report::ensure_dir(parent)?;
        }
        report::write_json(path, &analysis.report)?;
    }
    if let Some(dir) = &config.out {
        write_outputs(dir, &panel, &analysis, config.lines, config.quiet)?;
        if config.predictions {
            let files = report::write_predictions(dir, &panel, &analysis.frame, &analysis.fit)?;
            if !config.quiet {
                println!("Wrote {} and {}", files.0.display(), files.1.display());
            }
        }
    }
    Ok(())
}

fn write_outputs(dir: &Path, panel: &Panel, analysis: &crate::FitAnalysis, lines: usize, quiet: bool) -> Result<()> {
    let paths = sample_lines(panel, lines);
    let out = report::write_fit_outputs(dir, &analysis.report, &paths)?;
    if !quiet {
        println!(
            "\nWrote {}, {}, {} and {}",
            out.json.display(),
            out.csv.display(),
            out.png.display(),
            out.svg.display()
        );
    }
    Ok(())
}

/// The observed paths of `k` participants spread evenly through the file.
fn sample_lines(panel: &Panel, k: usize) -> Vec<Line> {
    let n_id = panel.id.n_levels();
    if k == 0 || n_id == 0 {
        return Vec::new();
    }
    let step = (n_id / k.min(n_id)).max(1);
    let mut wanted = vec![usize::MAX; n_id];
    let mut slot = 0;
    for i in (0..n_id).step_by(step).take(k) {
        wanted[i] = slot;
        slot += 1;
    }
    let mut lines: Vec<Line> = vec![Vec::new(); slot];
    for r in 0..panel.n() {
        let s = wanted[panel.id.codes[r] as usize];
        if s != usize::MAX {
            lines[s].push((panel.age[r], panel.outcome[r]));
        }
    }
    for l in &mut lines {
        l.sort_by(|a, b| a.0.total_cmp(&b.0));
    }
    lines
}

/// `braid inspect`: load, then describe the design.
fn inspect_command(a: &args::InspectArgs) -> Result<()> {
    let source = config::Source::resolve(a.data.as_ref(), a.study.as_deref(), &a.roles)?;
    if let Some(file) = &a.json {
        report::check_output(file, false, a.force, "--json")?;
    }
    if let Some(dir) = &a.out {
        report::check_output(dir, true, a.force, "--out")?;
    }
    let panel = data::load(&source.data, &source.roles, source.read)?;
    let options = crate::design::DesignOptions {
        band_width: a.band,
        thin_overlap: a.thin,
        cohort_rule: a.derive.cohort_rule(),
        wave_rule: a.derive.wave_rule(),
    };
    let report = crate::design::inspect(&panel, options)?;
    if !a.quiet {
        print!("{}", text::design_summary(&panel, &report));
    }
    if let Some(path) = &a.json {
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            report::ensure_dir(parent)?;
        }
        report::write_json(path, &report)?;
    }
    if let Some(dir) = &a.out {
        let written = report::write_design_outputs(dir, &panel, &report, options)?;
        if !a.quiet {
            println!("\nWritten to {}: {}", dir.display(), written.join(", "));
        }
    }
    Ok(())
}

/// `braid converge`: load, fit the nested cohort models, test, report.
fn converge_command(a: &args::ConvergeArgs) -> Result<()> {
    let config = FitConfig::from_args(&args::FitArgs {
        data: a.data.clone(),
        study: a.study.clone(),
        roles: a.roles.clone(),
        model: a.model.clone(),
        grid: 2,
        ..Default::default()
    })?;
    if let Some(file) = &a.json {
        report::check_output(file, false, a.force, "--json")?;
    }
    if let Some(dir) = &a.out {
        report::check_output(dir, true, a.force, "--out")?;
    }
    for (flag, v) in [
        ("--margin", a.margin),
        ("--margin-sd", a.margin_sd),
        ("--reference-age", a.reference_age),
    ] {
        if let Some(x) = v.filter(|x| !x.is_finite() || (flag != "--reference-age" && *x <= 0.0)) {
            return Err(Error::Spec {
                parameter: flag.into(),
                message: format!("{x} is not a usable value; give a positive finite number"),
            });
        }
    }
    if a.shared_ages == 0 || a.shared_ages > 1000 {
        return Err(Error::Spec {
            parameter: "--shared-ages".into(),
            message: format!("{} shared ages; choose between 1 and 1000", a.shared_ages),
        });
    }
    let panel = data::load(&config.data, &config.roles, config.read)?;
    let options = crate::linkage::ConvergeOptions {
        reference_age: a.reference_age,
        margin: match (a.margin, a.margin_sd) {
            (Some(m), _) => crate::linkage::Margin::Outcome(m),
            (None, Some(s)) => crate::linkage::Margin::Sd(s),
            (None, None) => crate::linkage::Margin::Sd(crate::linkage::DEFAULT_MARGIN_SD),
        },
        shared_ages: a.shared_ages,
        cohort_rule: a.derive.cohort_rule(),
        retest: a.retest.map(|r| match r {
            args::RetestArg::Count => crate::linkage::retest::RetestForm::Count,
            args::RetestArg::Later => crate::linkage::retest::RetestForm::Later,
            args::RetestArg::Sqrt => crate::linkage::retest::RetestForm::Sqrt,
        }),
    };
    let result = crate::linkage::converge(&panel, &config.model, &options)?;
    if !a.quiet {
        print!("{}", text::converge_summary(&panel, &result));
    }
    if let Some(path) = &a.json {
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            report::ensure_dir(parent)?;
        }
        report::write_json(path, &result)?;
    }
    if let Some(dir) = &a.out {
        report::ensure_dir(dir)?;
        report::write_json(&dir.join("converge.json"), &result)?;
        report::converge_figure::shared_ages(&dir.join("shared_ages.png"), &dir.join("shared_ages.svg"), &result)?;
        if !a.quiet {
            println!(
                "\nWritten to {}: converge.json, shared_ages.png, shared_ages.svg",
                dir.display()
            );
        }
    }
    Ok(())
}

/// `braid apc`: read a table of counts or records, fit, and report what is identified.
fn apc_command(a: &args::ApcArgs) -> Result<()> {
    use crate::apc::analysis::{Assumption, Constraint};
    let constraints: Vec<Constraint> = a
        .constraints
        .iter()
        .map(|c| Constraint::parse(c))
        .collect::<Result<_>>()?;
    let assumptions: Vec<Assumption> = a
        .assumptions
        .iter()
        .map(|c| Assumption::parse(c))
        .collect::<Result<_>>()?;
    if let Some(file) = &a.json {
        report::check_output(file, false, a.force, "--json")?;
    }
    let read = data::ReadOptions {
        delimiter: match &a.delimiter {
            Some(d) => config::parse_delimiter(d)?,
            None => b',',
        },
    };
    if let Some(dir) = &a.out {
        report::check_output(dir, true, a.force, "--out")?;
    }
    let mut records = None;
    let data = match (&a.outcome, &a.events, &a.exposure) {
        (Some(y), _, _) if a.id.is_some() => {
            let roles = data::Roles {
                id: a.id.clone().unwrap_or_default(),
                age: a.age.clone(),
                outcome: y.clone(),
                period: Some(a.period.clone()),
                ..Default::default()
            };
            let panel = data::load(&a.data, &roles, read)?;
            let period = panel.calendar.as_ref().map(|c| c.period.clone()).unwrap_or_default();
            let t = data::NumericTable {
                source: panel.source.clone(),
                columns: vec![panel.age.clone(), period, panel.outcome.clone()],
                n_rows_read: panel.n_rows_read,
                dropped: panel.dropped.total(),
                rows: panel.row.clone(),
            };
            let d = crate::apc::intake::from_panel(&t, &panel.id.codes, a.width)?;
            records = Some(t);
            d
        }
        (Some(y), _, _) => {
            let t = data::numeric_table(
                &a.data,
                &[("--age", &a.age), ("--period", &a.period), ("--outcome", y)],
                read,
            )?;
            let d = crate::apc::intake::from_records(&t, a.width)?;
            records = Some(t);
            d
        }
        (None, Some(ev), Some(ex)) => {
            let t = data::numeric_table(
                &a.data,
                &[
                    ("--age", &a.age),
                    ("--period", &a.period),
                    ("--events", ev),
                    ("--exposure", ex),
                ],
                read,
            )?;
            crate::apc::intake::from_table(&t, [&a.age, &a.period, ev, ex])?
        }
        _ => {
            return Err(Error::Spec {
                parameter: "--outcome".into(),
                message:
                    "give --outcome COLUMN (records) or --events COLUMN with --exposure COLUMN (a table of counts)"
                        .into(),
            });
        }
    };
    let mut result = crate::apc::analysis::analyse(&data, &constraints, &assumptions)?;
    if let (Some(c), Some(t)) = (&a.cohort, &records) {
        let births = data::numeric_table(&a.data, &[("--cohort", c)], read)?;
        // Rows with a missing birth year are not in the records' rows; match by row number.
        let by_row: std::collections::HashMap<usize, f64> = births
            .rows
            .iter()
            .copied()
            .zip(births.columns[0].iter().copied())
            .collect();
        let mut kept = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
        for (k, r) in t.rows.iter().enumerate() {
            if let Some(&b) = by_row.get(r) {
                kept.0.push(*r);
                kept.1.push(t.columns[0][k]);
                kept.2.push(t.columns[1][k]);
                kept.3.push(b);
            }
        }
        result.cohort_check = Some(crate::apc::analysis::check_cohort(
            &a.data, c, &kept.0, &kept.1, &kept.2, &kept.3,
        )?);
    }
    if let (true, Some(t)) = (a.hierarchical, &records) {
        result.hierarchical = Some(crate::apc::hierarchical::fit(t, &data)?);
    }
    if !a.quiet {
        print!("{}", text::apc_summary(&a.data, &result));
    }
    if let Some(dir) = &a.out {
        report::ensure_dir(dir)?;
        report::write_json(&dir.join("apc.json"), &result)?;
        let files = report::apc_figure::write(dir, &result)?;
        if !a.quiet {
            println!("\nWritten to {}: apc.json, {}", dir.display(), files.join(", "));
        }
    }
    if let Some(path) = &a.json {
        if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
            report::ensure_dir(parent)?;
        }
        report::write_json(path, &result)?;
    }
    Ok(())
}

/// `braid demo`: simulate the invented study, write it with its study file,
/// then fit it through the same route a user's study file takes.
fn demo_command(a: &DemoArgs) -> Result<()> {
    let mut design = Design::demo();
    if let Some(s) = a.seed {
        design.seed = s;
    }
    report::check_output(&a.out, true, a.force, "--out")?;
    let sim = simulate::simulate(&design);
    report::ensure_dir(&a.out)?;
    let panel_path = a.out.join("panel.csv");
    let (header, rows) = sim.table();
    data::read::write_csv(&panel_path, &header, &rows)?;
    data::read::write_parquet(
        &a.out.join("panel.parquet"),
        data::read::columns_from_text(&header, &rows),
    )?;
    let study = Study {
        data: DataSection {
            file: "panel.csv".into(),
            delimiter: None,
        },
        roles: simulate::Simulated::roles(true),
        model: ModelSpec {
            method: crate::lmm::Method::Reml,
            age: AgeSpec::Polynomial { degree: 2 },
            center: Some(design.truth.center),
            random: Some(vec![
                RandomSpec {
                    factor: "pupil".into(),
                    intercept: true,
                    slopes: vec!["age".into()],
                },
                RandomSpec {
                    factor: "school".into(),
                    intercept: true,
                    slopes: vec![],
                },
            ]),
        },
    };
    let study_path = a.out.join("study.toml");
    let toml_text = format!(
        "# braid study file for the invented Quillmere Reasoning Panel (simulated, seed {}).\n\
         # Edit the roles and model, then run: braid fit --study {}\n\n{}",
        design.seed,
        study_path.display(),
        study.to_toml()
    );
    std::fs::write(&study_path, toml_text).map_err(|e| Error::Output {
        path: study_path.clone(),
        message: format!("cannot write ({e})"),
    })?;
    let config = FitConfig::from_args(&args::FitArgs {
        study: Some(study_path),
        grid: 101,
        at: vec![12.0, 18.0, 23.0],
        quiet: a.quiet,
        ..Default::default()
    })?;
    let panel = data::load(&config.data, &config.roles, config.read)?;
    let analysis = crate::fit_panel(&panel, &config.model, &config.trajectory)?;
    if !a.quiet {
        println!("braid demo · the Quillmere Reasoning Panel (invented): five cohorts entering at ages 12 to 20,");
        println!("four annual waves, 24 schools, with dropout. Simulated truth is printed beside each estimate.\n");
        let t = &design.truth;
        let truth = vec![
            ("intercept".to_string(), t.mean[0]),
            ("age".to_string(), t.mean[1]),
            ("age^2".to_string(), t.mean[2]),
            ("sd:pupil:intercept".to_string(), t.sd_intercept),
            ("sd:pupil:age".to_string(), t.sd_slope),
            ("cor:pupil:age".to_string(), t.correlation),
            ("sd:school:intercept".to_string(), t.sd_school),
            ("sd:residual".to_string(), t.sd_residual),
        ];
        print!("{}", text::fit_summary(&analysis.report, Some(&truth)));
    }
    write_outputs(&a.out, &panel, &analysis, 60, a.quiet)?;
    let options = crate::design::DesignOptions::default();
    let design_report = crate::design::inspect(&panel, options)?;
    let written = report::write_design_outputs(&a.out, &panel, &design_report, options)?;
    if !a.quiet {
        println!("Wrote the design report and figures: {}", written.join(", "));
    }
    Ok(())
}
