//! The one way out: every command hands its report to the [`Emitter`], which
//! refuses to overwrite earlier results without `--force`, prints the text
//! screen unless `--quiet`, writes `--json` and the `--out` folder, and says
//! what it wrote.

use std::fs;
use std::path::Path;

use super::args::OutputArgs;
use crate::error::{Error, Result};
use crate::report::{Render, ensure_dir, write_json};

/// Where a command's results go, checked before any work is done.
#[derive(Debug)]
pub struct Emitter<'a> {
    out: &'a OutputArgs,
}

impl<'a> Emitter<'a> {
    /// Check the outputs: an existing `--json` file, or an `--out` folder
    /// that holds files, is refused unless `--force`.
    ///
    /// # Errors
    /// [`Error::Spec`] naming the output and the path.
    pub fn new(out: &'a OutputArgs) -> Result<Emitter<'a>> {
        if let Some(dir) = &out.out {
            refuse_overwrite(dir, true, out.force, "--out")?;
        }
        if let Some(file) = &out.json {
            refuse_overwrite(file, false, out.force, "--json")?;
        }
        Ok(Emitter { out })
    }

    /// Print the report's screen (unless quiet), then write its files.
    ///
    /// # Errors
    /// [`Error::Output`] when a file cannot be written.
    pub fn emit<R: Render>(&self, report: &R) -> Result<()> {
        if !self.out.quiet {
            print!("{}", report.text());
        }
        self.write(report)
    }

    /// Write the report's JSON file and output folder, and say what was written.
    ///
    /// # Errors
    /// [`Error::Output`] when a file cannot be written.
    pub fn write<R: Render>(&self, report: &R) -> Result<()> {
        if let Some(path) = &self.out.json {
            if let Some(parent) = path.parent().filter(|p| !p.as_os_str().is_empty()) {
                ensure_dir(parent)?;
            }
            write_json(path, report)?;
            self.say(&format!("\nWrote {}", path.display()));
        }
        if let Some(dir) = &self.out.out {
            ensure_dir(dir)?;
            let names = report.write_folder(dir)?;
            self.say(&format!("\nWritten to {}: {}", dir.display(), names.join(", ")));
        }
        Ok(())
    }

    fn say(&self, line: &str) {
        if !self.out.quiet {
            println!("{line}");
        }
    }
}

/// Refuse to write over earlier results: an output folder that exists and
/// holds files, or an output file that exists, is an error unless `force`.
fn refuse_overwrite(path: &Path, is_folder: bool, force: bool, flag: &str) -> Result<()> {
    if force || !path.exists() {
        return Ok(());
    }
    let occupied = !is_folder || fs::read_dir(path).map(|mut d| d.next().is_some()).unwrap_or(true);
    if occupied {
        return Err(Error::Spec {
            parameter: flag.into(),
            message: format!(
                "{} already exists{}; name a new {} or pass --force to overwrite",
                path.display(),
                if is_folder { " and holds files" } else { "" },
                if is_folder { "folder" } else { "file" }
            ),
        });
    }
    Ok(())
}
