//! Command-line flags, mirrored as clap structs. Only validation that needs
//! no I/O happens here; [`super::config`] turns these into a validated config.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand, ValueEnum, ValueHint};

use crate::apc::analysis::{Assumption, Constraint};

/// A value parsed by the library at the command line, so that a bad rule is
/// refused with the library's message before any work.
fn typed<T>(parse: fn(&str) -> crate::Result<T>) -> impl Fn(&str) -> Result<T, String> + Clone + Send + Sync {
    move |s| {
        parse(s).map_err(|e| match e {
            // clap names the value already.
            crate::Error::Spec { message, .. } => message
                .strip_prefix(&format!("'{s}': "))
                .unwrap_or(&message)
                .to_string(),
            other => other.to_string(),
        })
    }
}

/// braid: stitch, test and report age trajectories from cohort-sequential studies.
#[derive(Debug, Parser)]
#[command(name = "braid", version, about, long_about = None, propagate_version = true)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Fit one age trajectory to a long-format file (one row per participant per wave).
    Fit(Box<FitArgs>),
    /// Simulate an invented cohort-sequential study, write it with a study file, and run every analysis into report.html.
    Demo(DemoArgs),
    /// Report what a design covers: cohorts, waves, ages, overlap of neighbouring cohorts, retention.
    Inspect(Box<InspectArgs>),
    /// Test whether cohorts agree where their ages overlap, before pooling them into one curve.
    Converge(Box<ConvergeArgs>),
    /// Say what the data identify about age, period and cohort effects, and what each constraint adds.
    Apc(Box<ApcArgs>),
    /// Run the classical cohort × wave mixed ANOVA on complete cases, and show what the mixed model adds.
    Anova(Box<AnovaArgs>),
    /// Score multi-item scales per wave, with reliability per wave, cohort and cohort × wave.
    Score(Box<ScoreArgs>),
    /// Run every analysis the data allow and write one self-contained HTML page of the whole study.
    Report(Box<ReportArgs>),
    /// Plan a study before collecting it: power, precision and cost of candidate designs.
    Plan(Box<PlanArgs>),
    /// Print braid's manual page (roff), for `man -l -` or a man folder.
    Manual,
    /// Print a completion script for a shell, to be sourced by its start-up file.
    Completions(CompletionsArgs),
}

/// Flags of `braid report`: those of `braid fit`, and the classical ANOVA.
#[derive(Debug, Clone, Default, Args)]
pub struct ReportArgs {
    /// The data, roles, model and outputs, as for `braid fit`; --out is required.
    #[command(flatten)]
    pub fit: FitArgs,
    /// Also run the cohort × wave mixed ANOVA (or set `anova = true` under [report] in the study file).
    #[arg(long)]
    pub anova: bool,
}

/// How `braid plan` answers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum RouteArg {
    /// Expected information only: fast, no simulation.
    Information,
    /// Simulation only.
    Simulation,
    /// Both, side by side; the simulation decides.
    Both,
}

/// Flags of `braid plan`.
#[derive(Debug, Clone, Args)]
#[command(args_conflicts_with_subcommands = true, subcommand_negates_reqs = true)]
pub struct PlanArgs {
    /// Merge the shards of a sharded run.
    #[command(subcommand)]
    pub merge: Option<PlanCommand>,
    /// The plan file (TOML): [[design]] tables, [population], [costs], [targets], [simulation] and [search].
    #[arg(value_name = "PLAN.toml", value_hint = ValueHint::FilePath, required = true)]
    pub plan: Option<PathBuf>,
    /// Take the assumed population from a pilot study's fit.json (in place of the plan's [population]).
    #[arg(long, value_name = "FIT.json", value_hint = ValueHint::FilePath)]
    pub from: Option<PathBuf>,
    /// Answer by expected information, by simulation, or both [default: the plan's, else both].
    #[arg(long, value_enum)]
    pub route: Option<RouteArg>,
    /// The most replicates per design and n [default: the plan's, else 1000].
    #[arg(long, value_name = "N")]
    pub replicates: Option<usize>,
    /// Stop once every power's Monte Carlo SE is at most this; 0 runs every replicate [default: the plan's, else 0.01].
    #[arg(long, value_name = "SE")]
    pub precision: Option<f64>,
    /// Seed of every random step [default: the plan's].
    #[arg(long, value_name = "N")]
    pub seed: Option<u64>,
    /// Evaluate every design at this many participants per cohort instead of searching.
    #[arg(long, value_name = "N")]
    pub per_cohort: Option<usize>,
    /// Run replicate block K of N only (a cluster's job array); join the shards with `braid plan merge`.
    #[arg(long, value_name = "K/N")]
    pub shard: Option<String>,
    /// Where the results go: --out writes plan.json and the figures (a shard writes plan-shard.json).
    #[command(flatten)]
    pub output: OutputArgs,
}

/// The subcommand of `braid plan`.
#[derive(Debug, Clone, Subcommand)]
pub enum PlanCommand {
    /// Join the plan-shard.json files of every shard of one run into the plan's report.
    Merge(PlanMergeArgs),
}

/// Flags of `braid plan merge`.
#[derive(Debug, Clone, Args)]
pub struct PlanMergeArgs {
    /// Every shard's plan-shard.json.
    #[arg(value_name = "SHARD.json", required = true, value_hint = ValueHint::FilePath)]
    pub shards: Vec<PathBuf>,
    /// Where the results go: --out writes plan.json and the figures.
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Arguments of `braid completions`.
#[derive(Debug, Clone, Args)]
pub struct CompletionsArgs {
    /// The shell to complete braid's commands, flags and file names in.
    #[arg(value_enum, value_name = "SHELL")]
    pub shell: clap_complete::Shell,
}

/// Estimation criterion on the command line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum MethodArg {
    /// Restricted maximum likelihood.
    Reml,
    /// Maximum likelihood.
    Ml,
}

/// Column roles shared by commands that read a file.
#[derive(Debug, Clone, Default, Args)]
pub struct RoleArgs {
    /// Column holding the participant id.
    #[arg(long, value_name = "COLUMN")]
    pub id: Option<String>,
    /// Column holding exact age in years (with --birth-date and --date: the name given to the computed age).
    #[arg(long, value_name = "COLUMN")]
    pub age: Option<String>,
    /// Column holding the birth date (YYYY-MM-DD); with --date, age is computed as decimal years.
    #[arg(long, value_name = "COLUMN")]
    pub birth_date: Option<String>,
    /// Column holding the assessment date (YYYY-MM-DD).
    #[arg(long, value_name = "COLUMN")]
    pub date: Option<String>,
    /// Column holding the outcome.
    #[arg(long, value_name = "COLUMN")]
    pub outcome: Option<String>,
    /// Wide files (one row per participant): the outcome's column at each wave, in order (comma-separated).
    #[arg(long, value_name = "COLUMNS", value_delimiter = ',')]
    pub wide_outcome: Vec<String>,
    /// Wide files: the age column at each wave, in the same order.
    #[arg(long, value_name = "COLUMNS", value_delimiter = ',')]
    pub wide_age: Vec<String>,
    /// Wide files: the assessment-date column at each wave (with --birth-date).
    #[arg(long, value_name = "COLUMNS", value_delimiter = ',')]
    pub wide_date: Vec<String>,
    /// Column holding the birth cohort.
    #[arg(long, value_name = "COLUMN")]
    pub cohort: Option<String>,
    /// Column holding the wave or occasion.
    #[arg(long, value_name = "COLUMN")]
    pub wave: Option<String>,
    /// Column holding the cluster (for example the school); adds a random intercept per cluster.
    #[arg(long, value_name = "COLUMN")]
    pub cluster: Option<String>,
    /// Column holding the period: the calendar time of each assessment as a (decimal) year. Not needed with --date.
    #[arg(long, value_name = "COLUMN")]
    pub period: Option<String>,
    /// Column holding the birth year as a number. Not needed with --birth-date.
    #[arg(long, value_name = "COLUMN")]
    pub birth_year: Option<String>,
    /// A covariate column (repeatable); numeric unless its values are text or it is also given to --categorical.
    #[arg(long = "covariate", value_name = "COLUMN")]
    pub covariates: Vec<String>,
    /// Treat this covariate as categorical even if its values are numbers (repeatable).
    #[arg(long = "categorical", value_name = "COLUMN")]
    pub categorical: Vec<String>,
    /// Field delimiter of a CSV file: one character, or \t for tab [default: ,].
    #[arg(long, value_name = "CHAR")]
    pub delimiter: Option<String>,
}

/// Where the data come from: a file, a study file, or both (flags win).
#[derive(Debug, Clone, Default, Args)]
pub struct InputArgs {
    /// The data file (CSV, or Parquet by its .parquet extension); optional with --study.
    #[arg(value_name = "DATA", value_hint = ValueHint::FilePath)]
    pub data: Option<PathBuf>,
    /// A study file (TOML) stating the data, roles and model; flags given as well override it.
    #[arg(long, value_name = "FILE", value_hint = ValueHint::FilePath)]
    pub study: Option<PathBuf>,
    /// Column roles.
    #[command(flatten)]
    pub roles: RoleArgs,
}

/// Where the results go, shared by every command.
#[derive(Debug, Clone, Default, Args)]
pub struct OutputArgs {
    /// Write the report's JSON document to this file (no other files are
    /// written unless --out is also given).
    #[arg(long, value_name = "FILE", value_hint = ValueHint::FilePath)]
    pub json: Option<PathBuf>,
    /// Folder for the report's JSON document, figures and tables (created if missing).
    #[arg(long, value_name = "DIR", value_hint = ValueHint::DirPath)]
    pub out: Option<PathBuf>,
    /// Print nothing but errors (the files are still written).
    #[arg(long)]
    pub quiet: bool,
    /// Overwrite an existing --json file or the files of an existing --out folder.
    #[arg(long)]
    pub force: bool,
}

/// Flags of `braid fit`.
#[derive(Debug, Clone, Default, Args)]
pub struct FitArgs {
    /// The data and column roles.
    #[command(flatten)]
    pub input: InputArgs,
    /// The age basis and random part.
    #[command(flatten)]
    pub model: ModelArgs,
    /// Centre age of the basis and of the random slope [default: the mean age].
    #[arg(long, value_name = "AGE")]
    pub center: Option<f64>,
    /// Estimation criterion [default: reml].
    #[arg(long, value_enum)]
    pub method: Option<MethodArg>,
    /// Number of ages on the trajectory grid.
    #[arg(long, value_name = "N", default_value_t = 101)]
    pub grid: usize,
    /// Also report the mean and rate of change at these ages (comma-separated or repeated).
    #[arg(long, value_name = "AGES", value_delimiter = ',')]
    pub at: Vec<f64>,
    /// Also write predictions.csv (fitted values and residuals per row) and
    /// random_effects.csv (BLUPs per group) into the --out folder.
    #[arg(long, requires = "out")]
    pub predictions: bool,
    /// Draw this many participants' observed paths as thin lines in the figure.
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub lines: usize,
    /// Where the results go: --out writes fit.json, trajectory.csv, trajectory.png and trajectory.svg.
    #[command(flatten)]
    pub output: OutputArgs,
}

/// The age basis and random part, shared by the commands that fit models.
#[derive(Debug, Clone, Default, Args)]
pub struct ModelArgs {
    /// Degree of the centred age polynomial, 1 to 4 [default: 2].
    #[arg(long, value_name = "N", conflicts_with_all = ["knots", "knot_ages"])]
    pub degree: Option<usize>,
    /// Use a natural cubic spline in age with K interior knots at quantiles of age.
    #[arg(long, value_name = "K", conflicts_with = "knot_ages")]
    pub knots: Option<usize>,
    /// Use a natural cubic spline with interior knots at these ages (comma-separated).
    #[arg(long, value_name = "AGES", value_delimiter = ',')]
    pub knot_ages: Option<Vec<f64>>,
    /// Give participants a random intercept only (no random age slope).
    #[arg(long)]
    pub no_slope: bool,
    /// Give each cluster a random age slope as well as its intercept (needs a cluster column).
    #[arg(long, conflicts_with = "no_slope")]
    pub cluster_slope: bool,
    /// Hold every random term's intercept and slopes independent (a diagonal
    /// covariance) instead of estimating their correlations.
    #[arg(long)]
    pub uncorrelated: bool,
}

/// Flags of `braid inspect`.
#[derive(Debug, Clone, Default, Args)]
pub struct InspectArgs {
    /// The data and column roles.
    #[command(flatten)]
    pub input: InputArgs,
    /// Derived cohorts, when the file has no cohort column (or to override it).
    #[command(flatten)]
    pub derive: DeriveArgs,
    /// Width of the age bands of the cohort-by-age table, in years.
    #[arg(long, value_name = "YEARS", default_value_t = 1.0)]
    pub band: f64,
    /// Flag an overlap as thin when either cohort has fewer observations there than this.
    #[arg(long, value_name = "N", default_value_t = 30)]
    pub thin: usize,
    /// Where the results go: --out writes design.json and the Lexis diagram and coverage chart (PNG and SVG).
    #[command(flatten)]
    pub output: OutputArgs,
}

/// How a score is formed from the answered items.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum RuleArg {
    /// The mean of the answered items.
    Mean,
    /// The prorated sum: the mean of the answered items × the number of items.
    Sum,
}

/// Flags of `braid score`.
#[derive(Debug, Clone, Args)]
pub struct ScoreArgs {
    /// The data (one row per participant and wave) and the id, wave and optional cohort columns.
    #[command(flatten)]
    pub input: InputArgs,
    /// The items: comma-separated names, or ranges such as q1..q12 [default: the study file's [score]].
    #[arg(long, value_name = "LIST")]
    pub items: Option<String>,
    /// Reverse-keyed items (x becomes min + max − x): names or ranges.
    #[arg(long, value_name = "LIST")]
    pub reverse: Option<String>,
    /// The lowest legal response [default: the study file's [score]].
    #[arg(long, value_name = "X")]
    pub scale_min: Option<f64>,
    /// The highest legal response [default: the study file's [score]].
    #[arg(long, value_name = "X")]
    pub scale_max: Option<f64>,
    /// The score: the mean of the answered items, or their prorated sum [default: mean].
    #[arg(long, value_enum)]
    pub rule: Option<RuleArg>,
    /// A score needs at least this many answered items [default: all but one].
    #[arg(long, value_name = "K")]
    pub min_answered: Option<usize>,
    /// Columns copied to scores.csv (repeatable), for example age.
    #[arg(long = "pass", value_name = "COLUMN")]
    pub pass: Vec<String>,
    /// Column naming the alternate form each respondent took; forms are put on the first form's scale.
    #[arg(long, value_name = "COLUMN")]
    pub form: Option<String>,
    /// Anchor items shared by every form: forms are then equated through them (common items), at any waves.
    #[arg(long, value_name = "LIST")]
    pub anchor: Option<String>,
    /// Seed of the bootstrap SEs of the equating constants.
    #[arg(long, value_name = "N")]
    pub seed: Option<u64>,
    /// Where the results go: --out writes score.json and scores.csv.
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Flags of `braid anova`.
#[derive(Debug, Clone, Default, Args)]
pub struct AnovaArgs {
    /// The data and column roles (cohort is between participants, wave within).
    #[command(flatten)]
    pub input: InputArgs,
    /// Derived cohorts and waves, when the file has no such columns.
    #[command(flatten)]
    pub derive: DeriveArgs,
    /// Mauchly's test rejecting at this level counts as sphericity failing.
    #[arg(long, value_name = "LEVEL", default_value_t = 0.05)]
    pub sphericity_level: f64,
    /// Where the results go: --out writes anova.json, the cohort × wave means (CSV) and their figure.
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Flags of `braid converge`.
#[derive(Debug, Clone, Default, Args)]
pub struct ConvergeArgs {
    /// The data and column roles.
    #[command(flatten)]
    pub input: InputArgs,
    /// Derived cohorts, when the file has no cohort column.
    #[command(flatten)]
    pub derive: DeriveArgs,
    /// The age basis and random part.
    #[command(flatten)]
    pub model: ModelArgs,
    /// Age at which cohort level differences are measured [default: the median age inside the overlaps].
    #[arg(long, value_name = "AGE")]
    pub reference_age: Option<f64>,
    /// Equivalence margin in outcome units (instead of --margin-sd).
    #[arg(long, value_name = "UNITS", conflicts_with = "margin_sd")]
    pub margin: Option<f64>,
    /// Equivalence margin in SDs of the outcome [default: 0.2].
    #[arg(long, value_name = "SD")]
    pub margin_sd: Option<f64>,
    /// Shared ages compared per pair of neighbouring cohorts.
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub shared_ages: usize,
    /// Add a retest term and check whether this design identifies it: the number of prior assessments (count),
    /// first versus later (later), or its square root (sqrt).
    #[arg(long, value_name = "FORM", value_enum)]
    pub retest: Option<RetestArg>,
    /// Where the results go: --out writes converge.json and the shared-age figure (PNG and SVG).
    #[command(flatten)]
    pub output: OutputArgs,
}

/// Flags of `braid apc`.
#[derive(Debug, Clone, Default, Args)]
pub struct ApcArgs {
    /// The data and column roles: --age (exact years for records; the group's first year for a table),
    /// --period (calendar year of assessment, or the group's first year), --outcome (records), --id (panels:
    /// a random intercept per participant), --birth-year (records: checked against period − age).
    #[command(flatten)]
    pub input: InputArgs,
    /// A table of counts: column holding the number of events (instead of --outcome).
    #[arg(long, value_name = "COLUMN", requires = "exposure", conflicts_with = "outcome")]
    pub events: Option<String>,
    /// A table of counts: column holding the exposure (person-years).
    #[arg(long, value_name = "COLUMN", requires = "events")]
    pub exposure: Option<String>,
    /// Records: width of the age and period groups in years [default: about eight age groups]; a table keeps its own groups.
    #[arg(long, value_name = "YEARS", conflicts_with = "events")]
    pub width: Option<f64>,
    /// A just-identifying constraint (repeatable): equal:DIM:L1,L2, zero-slope:DIM or min-norm
    /// [default: equal:age:1,2, equal:cohort:1,2, zero-slope:period and min-norm].
    #[arg(long = "constraint", value_name = "RULE", value_parser = typed(Constraint::parse))]
    pub constraints: Vec<Constraint>,
    /// An assumption for the bounds (repeatable): DIM-slope>=V, DIM-slope<=V, DIM-slope=V, DIM:nondecreasing or DIM:nonincreasing.
    #[arg(long = "assume", value_name = "RULE", value_parser = typed(Assumption::parse))]
    pub assumptions: Vec<Assumption>,
    /// Records: also fit the hierarchical model (age polynomial, crossed random period and cohort intercepts).
    #[arg(long, requires = "outcome")]
    pub hierarchical: bool,
    /// Where the results go: --out writes apc.json and the figures (effects under each constraint, second
    /// differences, bounds).
    #[command(flatten)]
    pub output: OutputArgs,
}

/// The form of a retest term.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum RetestArg {
    /// The number of prior assessments.
    Count,
    /// 1 from the second assessment on.
    Later,
    /// The square root of the number of prior assessments.
    Sqrt,
}

/// How cohort is derived from birth year or first age.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum CohortFromArg {
    /// Whole-year age at the participant's first assessment.
    FirstAge,
    /// Calendar year of birth (needs dates, --birth-year or --period).
    BirthYear,
}

/// How wave is derived.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum WaveFromArg {
    /// The k-th assessment of each participant, in order of age.
    Order,
    /// Calendar rounds counted from each cohort's first assessment (needs dates or --period).
    Calendar,
}

/// Rules for deriving cohort and wave.
#[derive(Debug, Clone, Default, Args)]
pub struct DeriveArgs {
    /// Derive cohort this way [default: the --cohort column; else birth year when the file has calendar times; else first age].
    #[arg(long, value_name = "RULE", value_enum)]
    pub cohort_from: Option<CohortFromArg>,
    /// Width of derived cohort groups, in years.
    #[arg(long, value_name = "YEARS", default_value_t = 1.0)]
    pub cohort_width: f64,
    /// Derive wave this way [default: the --wave column; else calendar rounds when the file has calendar times; else order].
    #[arg(long, value_name = "RULE", value_enum)]
    pub wave_from: Option<WaveFromArg>,
    /// Length of a derived calendar round (wave), in years.
    #[arg(long, value_name = "YEARS", default_value_t = 1.0)]
    pub wave_length: f64,
}

impl DeriveArgs {
    /// The cohort rule these flags ask for.
    pub fn cohort_rule(&self) -> crate::data::derive::CohortRule {
        use crate::data::derive::CohortRule;
        match self.cohort_from {
            None => CohortRule::Auto,
            Some(CohortFromArg::FirstAge) => CohortRule::FirstAge {
                width: self.cohort_width,
            },
            Some(CohortFromArg::BirthYear) => CohortRule::BirthYear {
                width: self.cohort_width,
            },
        }
    }

    /// The wave rule these flags ask for.
    pub fn wave_rule(&self) -> crate::data::derive::WaveRule {
        use crate::data::derive::WaveRule;
        match self.wave_from {
            None => WaveRule::Auto,
            Some(WaveFromArg::Order) => WaveRule::Order,
            Some(WaveFromArg::Calendar) => WaveRule::Calendar {
                length: self.wave_length,
            },
        }
    }
}

/// Flags of `braid demo`.
#[derive(Debug, Clone, Args)]
pub struct DemoArgs {
    /// Folder for panel.csv, study.toml, every analysis's JSON and figures, and report.html.
    #[arg(long, value_name = "DIR", value_hint = ValueHint::DirPath)]
    pub out: PathBuf,
    /// Seed of the simulation.
    #[arg(long, value_name = "N")]
    pub seed: Option<u64>,
    /// Print nothing but errors.
    #[arg(long)]
    pub quiet: bool,
    /// Overwrite the files of an existing --out folder.
    #[arg(long)]
    pub force: bool,
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    // clap's own consistency check of the flag definitions.
    #[test]
    fn clap_definitions_are_consistent() {
        Cli::command().debug_assert();
    }
}
