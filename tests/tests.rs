//! braid's integration tests: one binary, one module per concern.

#[path = "suite/anova.rs"]
mod anova; // the cohort × wave mixed ANOVA against pingouin, closed forms, invariances
#[path = "suite/apc.rs"]
mod apc; // age–period–cohort: Holford's table, Kupper's null vector, bounds
#[path = "suite/cli.rs"]
mod cli; // what a user sees: the demo, fit outputs, and one-line errors on bad input
#[path = "suite/closed_form.rs"]
mod closed_form; // balanced one-way random effects: REML equals the ANOVA estimators
#[path = "suite/common.rs"]
mod common; // helpers shared by the modules
#[path = "suite/design.rs"]
mod design; // the design report against the truth of seeded simulations
#[path = "suite/distributions.rs"]
mod distributions; // t quantiles against scipy and closed forms, at every df braid meets
#[path = "suite/fuzz.rs"]
mod fuzz; // seeded random CSV files and study files never make braid panic
#[path = "suite/grouped.rs"]
mod grouped; // group-specific covariances: the separable identity and recovery
#[path = "suite/invariance.rs"]
mod invariance; // row order, id recoding, shifting and scaling age
#[path = "suite/linkage.rs"]
mod linkage; // convergence tests: reference likelihood ratios, size and power
#[path = "suite/page.rs"]
mod page; // the study's HTML page: numbers equal their JSON, and a real browser renders it
#[path = "suite/plan.rs"]
mod plan; // planning: the closed-form SE, simulated power and size, shards, bad plans
#[path = "suite/recovery.rs"]
mod recovery; // seeded simulations recover the known truth
#[path = "suite/reference.rs"]
mod reference; // statsmodels MixedLM reference fits on published and simulated data
#[path = "suite/routes.rs"]
mod routes; // the blocked and the sparse route agree; the sparse route against statsmodels
#[path = "suite/score.rs"]
mod score; // scoring and reliability against pingouin and Feldt, closed forms
#[path = "suite/snapshots.rs"]
mod snapshots; // every text screen of the demo against its reviewed snapshot
#[path = "suite/structures.rs"]
mod structures; // covariance structures against statsmodels variance components, an identity, recovery
#[path = "suite/tolerance.rs"]
mod tolerance; // every tolerance, named, in one place
