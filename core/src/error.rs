//! The crate's error type.

use std::fmt;
use std::path::PathBuf;

/// One problem found in an input file, with everything needed to find and fix it.
#[derive(Clone, Debug, PartialEq)]
pub struct Problem {
    /// 1-based line in the file, when known.
    pub line: Option<usize>,
    /// The record the problem is in, e.g. `bus 12` or `line "North-South"`.
    pub record: String,
    /// The field at fault, when one is.
    pub field: Option<String>,
    /// The offending value as written or computed, when there is one.
    pub value: Option<String>,
    /// What is wrong, lowercase, no trailing period.
    pub message: String,
}

impl Problem {
    /// A problem in `record` (at `line`, when known) with no particular field.
    pub fn new(
        line: Option<usize>,
        record: impl Into<String>,
        message: impl Into<String>,
    ) -> Problem {
        Problem {
            line,
            record: record.into(),
            field: None,
            value: None,
            message: message.into(),
        }
    }

    /// The same problem, pinned to a field and its value.
    pub fn field(mut self, field: impl Into<String>, value: impl fmt::Display) -> Problem {
        self.field = Some(field.into());
        self.value = Some(value.to_string());
        self
    }
}

impl fmt::Display for Problem {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(line) = self.line {
            write!(f, "line {line}: ")?;
        }
        write!(f, "{}", self.record)?;
        match (&self.field, &self.value) {
            (Some(field), Some(value)) => write!(f, ", field `{field}` = {value}")?,
            (Some(field), None) => write!(f, ", field `{field}`")?,
            _ => {}
        }
        write!(f, ": {}", self.message)
    }
}

/// Errors of `holdfast-core`. Messages are lowercase and name the file, line, field and value.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum Error {
    /// A file could not be read or written.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating-system error.
        source: std::io::Error,
    },
    /// A grid file is not valid TOML or does not have the expected shape.
    #[error("{path}:{line}:{column}: {message}")]
    Syntax {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What the parser found wrong.
        message: String,
    },
    /// A grid file declares a format version this build does not read.
    #[error("{path}: format_version {found} is not supported (this build reads {supported:?})")]
    UnsupportedVersion {
        /// The file.
        path: PathBuf,
        /// The version in the file.
        found: i64,
        /// The versions this build reads.
        supported: Vec<i64>,
    },
    /// A grid file parsed, but its content is invalid; every problem found is listed.
    #[error("{path}: {} problem(s) found:\n{}", problems.len(), list(problems))]
    Invalid {
        /// The file.
        path: PathBuf,
        /// Each problem, in file order.
        problems: Vec<Problem>,
    },
    /// An IEEE Common Data Format file could not be read.
    #[error("{path}:{line}: {message}")]
    Cdf {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// What is wrong, naming the field and value.
        message: String,
    },
    /// The power flow did not converge.
    #[error("{0}")]
    Diverged(crate::powerflow::Divergence),
    /// An outage names an element the grid does not have.
    #[error("no branch, machine or wind plant has the id \"{id}\"")]
    UnknownElement {
        /// The id asked for.
        id: String,
    },
    /// A network matrix could not be factorised (e.g. an island left floating).
    #[error("singular matrix: {0}")]
    Singular(String),
    /// A dynamic simulation cannot start: a model lacks data or cannot be initialised at the
    /// given operating point, or a scenario asks for something impossible.
    #[error("dynamic simulation: {0}")]
    Dynamics(String),
    /// A grid could not be written out.
    #[error("cannot serialise grid: {0}")]
    Serialise(String),
}

fn list(problems: &[Problem]) -> String {
    problems
        .iter()
        .map(|p| format!("  {p}"))
        .collect::<Vec<_>>()
        .join("\n")
}
