//! The crate's error type.
//!
//! Every variant names the file, column, row, value or parameter at fault and
//! its message says what to do next. A panic anywhere in braid is a bug; bad
//! user data always arrives here.

use std::fmt;
use std::path::PathBuf;

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
        /// The role the column was given (for example `--age`).
        role: String,
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
    /// A model or command option is invalid.
    Spec {
        /// The option or study-file key at fault.
        parameter: String,
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
            Error::Spec { parameter, message } => write!(f, "{parameter}: {message}"),
            Error::Numerical { step, message } => write!(f, "{step}: {message}"),
            Error::Output { path, message } => write!(f, "{}: {message}", path.display()),
        }
    }
}

impl std::error::Error for Error {}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;
