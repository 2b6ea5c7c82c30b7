//! The command line: flags → validated config → one pipeline function.
//!
//! [`run`] reads as the architecture: load, specify, fit, infer, report.

pub mod args;
pub mod config;
pub mod emit;
pub mod progress;
pub mod routes;

use std::path::{Path, PathBuf};

use clap::Parser;

use crate::data::{self, Panel};
use crate::error::Result;
use crate::simulate::{self, Design};
use crate::spec::{AgeSpec, ModelSpec, RandomSpec};
use args::{Cli, Command, DemoArgs};
use config::{DataSection, Source, Study};
use emit::Emitter;

/// Keep freed memory in the process for reuse instead of returning it to the
/// system at once. Each fit allocates, fills and frees buffers of tens of
/// megabytes on a million rows; returned and taken back, every page of them
/// is faulted in and zeroed again (notes/decisions.md, "libc"; measured in
/// notes/benchmarks.md, ninth session). Blocks up to [`MMAP_THRESHOLD`] then
/// come from the heap, not separate mappings, and the heap is not trimmed;
/// larger ones (a column of ten million rows) keep their own mappings, which
/// grow without copying.
fn keep_freed_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt only sets the allocator's tuning parameters; it is
    // called once, before any other thread exists.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, MMAP_THRESHOLD);
        libc::mallopt(libc::M_TRIM_THRESHOLD, i32::MAX);
    }
}

/// The allocator's largest threshold for separate mappings (32 MiB on 64-bit
/// systems; a larger value is refused).
#[cfg(all(target_os = "linux", target_env = "gnu"))]
const MMAP_THRESHOLD: i32 = 32 << 20;

/// Parse the process arguments and run; returns the exit code.
pub fn main_exit_code() -> i32 {
    keep_freed_memory();
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
            let e = e.with_routes(routes::route, routes::spell);
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
        Command::Fit(a) => fit_command(&a),
        Command::Demo(a) => demo_command(&a),
        Command::Inspect(a) => inspect_command(&a),
        Command::Converge(a) => converge_command(&a),
        Command::Apc(a) => apc_command(&a),
        Command::Anova(a) => anova_command(&a),
        Command::Score(a) => score_command(&a),
        Command::Plan(a) => plan_command(&a),
        Command::Report(a) => report_command(&a),
        Command::Manual => manual_command(),
        Command::Completions(a) => {
            completions_command(&a);
            Ok(())
        }
    }
}

/// `braid completions SHELL`: the shell's completion script, on standard output.
fn completions_command(a: &args::CompletionsArgs) {
    use clap::CommandFactory;
    clap_complete::generate(a.shell, &mut Cli::command(), "braid", &mut std::io::stdout());
}

/// `braid manual`: the manual page, from the same clap definitions as `--help`.
fn manual_command() -> Result<()> {
    use clap::CommandFactory;
    let mut out = std::io::stdout();
    clap_mangen::Man::new(Cli::command())
        .render(&mut out)
        .map_err(|e| crate::Error::Output {
            path: "standard output".into(),
            message: format!("cannot write the manual page ({e})"),
        })
}

/// `braid report`: every analysis the data allow, and the page that gathers them.
fn report_command(a: &args::ReportArgs) -> Result<()> {
    let (source, options) = a.options()?;
    let emitter = Emitter::new(&a.fit.output)?;
    let bar = progress::steps(a.fit.output.quiet);
    let report = study_report(&source, &options, a.fit.input.study.as_deref(), Vec::new(), &bar);
    bar.finish_and_clear();
    emitter.emit(&report?)
}

/// Load, analyse and score a study, with what it takes to run it again.
fn study_report(
    source: &Source,
    options: &crate::study::StudyOptions,
    study_file: Option<&Path>,
    mut seeds: Vec<(String, u64)>,
    bar: &indicatif::ProgressBar,
) -> Result<crate::study::StudyReport> {
    bar.set_message("reading");
    let panel = load(source)?;
    seeds.push((
        "simultaneous bands of the shared-age differences".into(),
        crate::linkage::SIMULTANEOUS_SEED,
    ));
    let scale = scale_report(source)?;
    if let Some(s) = &scale {
        seeds.push(("bootstrap SEs of the form equating".into(), s.options.seed));
    }
    let study_text = match study_file {
        Some(p) => Some(std::fs::read_to_string(p).map_err(|e| crate::Error::Io {
            path: p.to_path_buf(),
            message: e.to_string(),
        })?),
        None => None,
    };
    let provenance = crate::study::Provenance {
        braid_version: env!("CARGO_PKG_VERSION").into(),
        command: command_line(),
        study_file: study_text,
        data_file: source.data.display().to_string(),
        data_sha256: crate::study::sha256_file(&source.data)?,
        seeds,
    };
    // The analyses run in two lanes side by side: the line names what each
    // lane is doing now.
    let lanes = std::sync::Mutex::new([String::new(), String::new()]);
    let mut report = crate::study::analyse(&panel, options, provenance, &|lane: usize, step: &str| {
        let Ok(mut lanes) = lanes.lock() else { return };
        if let Some(l) = lanes.get_mut(lane) {
            *l = step.to_string();
        }
        let running: Vec<&str> = lanes.iter().map(String::as_str).filter(|s| !s.is_empty()).collect();
        bar.set_message(if running.is_empty() {
            "writing".to_string()
        } else {
            running.join(" · ")
        });
    })?;
    report.score = scale;
    Ok(report)
}

/// The command as typed, with arguments that hold spaces quoted.
fn command_line() -> String {
    let mut words: Vec<String> = std::env::args()
        .map(|w| {
            if w.is_empty() || w.contains([' ', '"', '\'', '$']) {
                format!("'{}'", w.replace('\'', r"'\''"))
            } else {
                w
            }
        })
        .collect();
    if let Some(first) = words.first_mut() {
        *first = "braid".into();
    }
    words.join(" ")
}

/// The scale's scoring and reliability, when the study file names one.
fn scale_report(source: &Source) -> Result<Option<crate::score::ScoreReport>> {
    let Some(scale) = source.study.as_ref().and_then(|s| s.score.as_ref()) else {
        return Ok(None);
    };
    let Some(wave) = source.roles.wave.clone() else {
        return Ok(None);
    };
    let (items, options) = scale.options()?;
    let columns = crate::score::ItemColumns {
        id: source.roles.id.clone(),
        wave,
        cohort: source.roles.cohort.clone(),
        items,
        ..Default::default()
    };
    let input = crate::score::ItemInput::read(&source.data, &columns, source.read)?;
    crate::score::score(&input, &options).map(Some)
}

/// Load the data; when the study file names a scale, its score is the
/// outcome, computed from the items.
fn load(source: &Source) -> Result<Panel> {
    match source.study.as_ref().and_then(|s| s.score.as_ref()) {
        Some(scale) => {
            let (items, options) = scale.options()?;
            let values = crate::score::score_column(&source.data, &items, &options, source.read)?;
            data::load_with_outcome(&source.data, &source.roles, source.read, &values)
        }
        None => data::load(&source.data, &source.roles, source.read),
    }
}

/// `braid fit`: load, specify, fit, infer, report.
fn fit_command(a: &args::FitArgs) -> Result<()> {
    let (source, request) = a.request()?;
    let emitter = Emitter::new(&a.output)?;
    let bar = progress::steps(a.output.quiet);
    bar.set_message("reading");
    let report = load(&source).and_then(|panel| {
        bar.set_message("fitting");
        crate::fit_panel(&panel, &request)
    });
    bar.finish_and_clear();
    emitter.emit(&report?.report)
}

/// `braid inspect`: load, then describe the design.
fn inspect_command(a: &args::InspectArgs) -> Result<()> {
    let (source, options) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let panel = load(&source)?;
    emitter.emit(&crate::design::inspect(&panel, options)?)
}

/// `braid converge`: load, fit the nested cohort models, test, report.
fn converge_command(a: &args::ConvergeArgs) -> Result<()> {
    let (source, model, options) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let bar = progress::steps(a.output.quiet);
    bar.set_message("reading");
    let report = load(&source).and_then(|panel| {
        bar.set_message("fitting the cohort models");
        crate::linkage::converge(&panel, &model, &options)
    });
    bar.finish_and_clear();
    emitter.emit(&report?)
}

/// `braid anova`: load, then the cohort × wave mixed ANOVA on complete cases.
fn anova_command(a: &args::AnovaArgs) -> Result<()> {
    let (source, options) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let panel = load(&source)?;
    emitter.emit(&crate::anova::mixed_anova(&panel, &options)?)
}

/// `braid score`: read the items, score them, measure their reliability.
fn score_command(a: &args::ScoreArgs) -> Result<()> {
    let (source, columns, options) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let input = crate::score::ItemInput::read(&source.data, &columns, source.read)?;
    emitter.emit(&crate::score::score(&input, &options)?)
}

/// `braid plan`: read the plan, answer it (or one shard of it), report;
/// `braid plan merge`: join the shards.
fn plan_command(a: &args::PlanArgs) -> Result<()> {
    if let Some(args::PlanCommand::Merge(m)) = &a.merge {
        let emitter = Emitter::new(&m.output)?;
        let shards: Vec<_> = m
            .shards
            .iter()
            .map(|p| crate::plan::shard::read(p))
            .collect::<Result<_>>()?;
        return emitter.emit(&crate::plan::shard::merge(&shards)?);
    }
    let (plan, population_source, shard) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let bar = progress::bar(a.output.quiet, "replicates");
    let context = crate::plan::RunContext {
        population_source,
        progress: &|k| bar.inc(k as u64),
    };
    let result = match shard {
        Some(s) => emitter.emit(&crate::plan::shard::run_shard(&plan, s, &context)?),
        None => emitter.emit(&crate::plan::run(&plan, &context)?),
    };
    bar.finish_and_clear();
    result
}

/// `braid apc`: read a table of counts or records, fit, and report what is identified.
fn apc_command(a: &args::ApcArgs) -> Result<()> {
    let (source, columns, options) = a.options()?;
    let emitter = Emitter::new(&a.output)?;
    let input = crate::apc::ApcInput::read(&source.data, &columns, source.read)?;
    emitter.emit(&crate::apc::identify(&input, &options)?)
}

/// `braid demo`: simulate the invented study, write it with its study file,
/// then run every analysis through the same route a user's study file takes
/// (`braid report`), and write the page that gathers them.
fn demo_command(a: &DemoArgs) -> Result<()> {
    let mut design = Design::demo();
    design.seed = a.seed.unwrap_or(design.seed);
    let output = args::OutputArgs {
        out: Some(a.out.clone()),
        quiet: a.quiet,
        force: a.force,
        ..Default::default()
    };
    let emitter = Emitter::new(&output)?;
    let study = write_demo_study(&design, &a.out)?;
    let report_args = args::ReportArgs {
        fit: args::FitArgs {
            output: output.clone(),
            ..demo_fit_args(study.clone())
        },
        anova: true,
    };
    let (source, options) = report_args.options()?;
    let bar = progress::steps(a.quiet);
    let seeds = vec![("simulation of the invented study".to_string(), design.seed)];
    let report = study_report(&source, &options, Some(&study), seeds, &bar);
    bar.finish_and_clear();
    let mut report = report?;
    report.fit.truth = Some(demo_truth(&design));
    if !a.quiet {
        println!("braid demo · the Quillmere Reasoning Panel (invented): five cohorts entering at ages 12 to 20,");
        println!("four annual waves, 24 schools, with dropout. Simulated truth is printed beside each estimate.\n");
        print!("{}", crate::report::Render::text(&report.fit));
    }
    emitter.write(&report)?;
    if !a.quiet {
        println!(
            "Open {} in a browser: the whole study on one page.",
            a.out.join("report.html").display()
        );
    }
    Ok(())
}

/// The fit flags the demo's study file is run with.
fn demo_fit_args(study: PathBuf) -> args::FitArgs {
    args::FitArgs {
        input: args::InputArgs {
            study: Some(study),
            ..Default::default()
        },
        grid: 101,
        at: vec![12.0, 18.0, 23.0],
        lines: 60,
        ..Default::default()
    }
}

/// The demo's true values, printed beside the estimates.
fn demo_truth(design: &Design) -> Vec<(String, f64)> {
    let t = &design.truth;
    [
        ("intercept", t.mean[0]),
        ("age", t.mean[1]),
        ("age^2", t.mean[2]),
        ("sd:pupil:intercept", t.sd_intercept),
        ("sd:pupil:age", t.sd_slope),
        ("cor:pupil:age", t.correlation),
        ("sd:school:intercept", t.sd_school),
        ("sd:residual", t.sd_residual),
    ]
    .map(|(k, v)| (k.to_string(), v))
    .to_vec()
}

/// Simulate the demo study and write panel.csv, panel.parquet and
/// study.toml into `dir`; returns the study file's path.
fn write_demo_study(design: &Design, dir: &Path) -> Result<PathBuf> {
    let sim = simulate::simulate(design);
    crate::report::ensure_dir(dir)?;
    let (header, rows) = sim.table();
    data::read::write_csv(&dir.join("panel.csv"), &header, &rows)?;
    data::read::write_parquet(
        &dir.join("panel.parquet"),
        data::read::columns_from_text(&header, &rows),
    )?;
    let study = Study {
        data: DataSection {
            file: "panel.csv".into(),
            delimiter: None,
        },
        roles: simulate::Simulated::roles(true),
        model: demo_model(design),
        score: None,
        report: Some(config::ReportSection { anova: true }),
    };
    let study_path = dir.join("study.toml");
    // The comment names the study file relative to its own folder, so the
    // file never records where the user keeps it.
    let toml_text = format!(
        "# braid study file for the invented Quillmere Reasoning Panel (simulated, seed {}).\n\
         # Edit the roles and model, then run from this folder: braid fit --study study.toml\n\n{}",
        design.seed,
        study.to_toml()
    );
    crate::report::write_text(&study_path, &toml_text)?;
    Ok(study_path)
}

/// The demo's model: a quadratic in age, random intercept and age slope per
/// pupil, random intercept per school.
fn demo_model(design: &Design) -> ModelSpec {
    ModelSpec {
        method: crate::lmm::Method::Reml,
        age: AgeSpec::Polynomial { degree: 2 },
        center: Some(design.truth.center),
        random: Some(vec![
            RandomSpec {
                factor: "pupil".into(),
                intercept: true,
                slopes: vec!["age".into()],
                covariance: Default::default(),
            },
            RandomSpec {
                factor: "school".into(),
                intercept: true,
                slopes: vec![],
                covariance: Default::default(),
            },
        ]),
    }
}
