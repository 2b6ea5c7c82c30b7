//! Feedback on long work: a counter on standard error (indicatif), drawn
//! only when standard error is a terminal and the user did not ask for quiet.

use std::io::IsTerminal;

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

/// A counter of `unit` done, with the elapsed time; hidden when `quiet` or
/// when standard error is not a terminal.
pub fn bar(quiet: bool, unit: &str) -> ProgressBar {
    spinner(
        quiet,
        &format!("{{spinner}} {{pos}} {unit} · {{elapsed}} · {{per_sec}}"),
    )
}

/// A spinner naming the step under way, with the elapsed time; hidden when
/// `quiet` or when standard error is not a terminal.
pub fn steps(quiet: bool) -> ProgressBar {
    spinner(quiet, "{spinner} {msg} · {elapsed}")
}

/// A spinner drawn with `template`, or a hidden one.
fn spinner(quiet: bool, template: &str) -> ProgressBar {
    if quiet || !std::io::stderr().is_terminal() {
        return ProgressBar::with_draw_target(None, ProgressDrawTarget::hidden());
    }
    let bar = ProgressBar::new_spinner();
    if let Ok(style) = ProgressStyle::with_template(template) {
        bar.set_style(style);
    }
    bar.enable_steady_tick(std::time::Duration::from_millis(200));
    bar
}
