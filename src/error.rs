//! The crate's error type.
//!
//! Every variant names the file, column, row, value or parameter at fault and
//! its message says what to do next. A panic anywhere in braid is a bug; bad
//! user data always arrives here.

use std::fmt;
use std::path::PathBuf;

/// An option or column role, named by its key as in a study file (`degree`,
/// `outcome`, `width`). The library never spells a command-line flag; the
/// command line fills in `route`, the way the user can set it there.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Setting {
    /// The key, as in a study file or an options struct.
    pub key: Box<str>,
    /// How the user sets it, filled in by the front end (for example
    /// "`--degree` (or `degree` under [model.age] in the study file)").
    pub route: Option<Box<str>>,
}

impl Setting {
    /// A setting named by its key, with no route yet.
    pub fn new(key: impl Into<String>) -> Setting {
        Setting {
            key: key.into().into_boxed_str(),
            route: None,
        }
    }
}

impl From<&str> for Setting {
    fn from(key: &str) -> Setting {
        Setting::new(key)
    }
}

impl From<String> for Setting {
    fn from(key: String) -> Setting {
        Setting::new(key)
    }
}

impl fmt::Display for Setting {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.route {
            Some(r) => f.write_str(r),
            None => f.write_str(&self.key),
        }
    }
}

/// Everything that can go wrong in braid, as a value.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum Error {
    /// An input file could not be opened or read.
    Io {
        /// The file at fault.
        path: PathBuf,
        /// The operating system's message.
        message: String,
    },
    /// A file could be opened but not parsed as a table.
    Parse {
        /// The file at fault.
        path: PathBuf,
        /// What went wrong, with advice.
        message: String,
    },
    /// A column named by the user is not in the file.
    MissingColumn {
        /// The file at fault.
        path: PathBuf,
        /// The role the column was given (for example `age`).
        role: Setting,
        /// The column name asked for.
        column: String,
        /// The columns that the file has.
        available: Vec<String>,
    },
    /// A value in a data row is unusable.
    BadValue {
        /// The file at fault.
        path: PathBuf,
        /// The column holding the value.
        column: String,
        /// The 1-based data row (the header is row 0).
        row: usize,
        /// The offending value as text.
        value: String,
        /// What is wrong and what to do.
        advice: String,
    },
    /// The data are readable but cannot support the requested model.
    Data {
        /// The file at fault.
        path: PathBuf,
        /// What is wrong and what to do.
        message: String,
    },
    /// Two roles name the same column.
    SharedColumn {
        /// The column named twice.
        column: String,
        /// The role that claimed it first.
        first: Setting,
        /// The role that claimed it again.
        second: Setting,
    },
    /// A model or command option is invalid.
    Spec {
        /// The option or study-file key at fault.
        parameter: Setting,
        /// What is wrong and what to do.
        message: String,
    },
    /// The numerical engine could not proceed.
    Numerical {
        /// Which step failed.
        step: String,
        /// What is wrong and what to do.
        message: String,
    },
    /// An output could not be written.
    Output {
        /// The file or folder at fault.
        path: PathBuf,
        /// What is wrong and what to do.
        message: String,
    },
}

impl Error {
    /// Fill in the way a front end lets the user set each named setting.
    /// `route(key)` gives the full route for a setting field; `spell(key)`
    /// the short spelling that replaces a setting written as `` `key` `` inside
    /// a message. Either returns `None` to leave the key as it is.
    #[must_use]
    pub fn with_routes(
        mut self,
        route: impl Fn(&str) -> Option<String>,
        spell: impl Fn(&str) -> Option<String>,
    ) -> Error {
        let fill = |s: &mut Setting| {
            if s.route.is_none() {
                s.route = route(&s.key).map(String::into_boxed_str);
            }
        };
        match &mut self {
            Error::MissingColumn { role, .. } => fill(role),
            Error::SharedColumn { first, second, .. } => {
                fill(first);
                fill(second);
            }
            Error::Spec { parameter, .. } => fill(parameter),
            _ => {}
        }
        if let Some(m) = self.message_mut() {
            *m = spell_keys(m, &spell);
        }
        if let Error::MissingColumn { available, .. } = &mut self {
            for a in available {
                *a = spell_keys(a, &spell);
            }
        }
        self
    }

    fn message_mut(&mut self) -> Option<&mut String> {
        // A parse error quotes another library's message, whose backticks are its own.
        match self {
            Error::Data { message, .. }
            | Error::Spec { message, .. }
            | Error::Numerical { message, .. }
            | Error::Output { message, .. } => Some(message),
            Error::BadValue { advice, .. } => Some(advice),
            _ => None,
        }
    }

    /// The process exit code for this error: 2 for bad input or options,
    /// 3 for numerical failure, 4 for failure to write output.
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::Numerical { .. } => 3,
            Error::Output { .. } => 4,
            _ => 2,
        }
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Error::Io { path, message } => {
                write!(
                    f,
                    "{}: cannot read the file ({message}); check the path and permissions",
                    path.display()
                )
            }
            Error::Parse { path, message } => write!(f, "{}: {message}", path.display()),
            Error::MissingColumn {
                path,
                role,
                column,
                available,
            } => {
                let shown: Vec<&str> = available.iter().take(12).map(String::as_str).collect();
                let more = if available.len() > 12 { ", ..." } else { "" };
                write!(
                    f,
                    "{}: no column '{column}' for {role}; the file has columns [{}{more}]; check the spelling or the delimiter",
                    path.display(),
                    shown.join(", ")
                )
            }
            Error::BadValue {
                path,
                column,
                row,
                value,
                advice,
            } => write!(
                f,
                "{}: column '{column}', row {row}: value '{value}' {advice}",
                path.display()
            ),
            Error::Data { path, message } => write!(f, "{}: {message}", path.display()),
            Error::SharedColumn { column, first, second } => write!(
                f,
                "{second}: column '{column}' is already used for {first}; give each role its own column"
            ),
            Error::Spec { parameter, message } => write!(f, "{parameter}: {message}"),
            Error::Numerical { step, message } => write!(f, "{step}: {message}"),
            Error::Output { path, message } => write!(f, "{}: {message}", path.display()),
        }
    }
}

impl std::error::Error for Error {}

/// Replace each `` `key` `` in a message whose key `spell` knows.
fn spell_keys(message: &str, spell: &impl Fn(&str) -> Option<String>) -> String {
    let mut out = String::with_capacity(message.len());
    let mut rest = message;
    while let Some(open) = rest.find('`') {
        let Some(len) = rest[open + 1..].find('`') else {
            break;
        };
        let key = &rest[open + 1..open + 1 + len];
        out.push_str(&rest[..open]);
        match spell(key) {
            Some(s) => out.push_str(&s),
            None => out.push_str(&rest[open..open + len + 2]),
        }
        rest = &rest[open + len + 2..];
    }
    out.push_str(rest);
    out
}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;
