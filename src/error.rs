//! The one error type of the library, where spec problems are located, and the
//! exit code each failure maps to.
//!
//! This module owns wording and exit codes. It depends on nothing else in the
//! crate, so every stage can return [`Error`] without pulling in another stage.

use std::fmt;
use std::path::{Path, PathBuf};

/// Where a spec problem is. Lines and columns are 1-based.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Location {
    /// The spec file, as the user named it.
    pub file: PathBuf,
    /// 1-based line.
    pub line: usize,
    /// 1-based column.
    pub column: usize,
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}:{}:{}", self.file.display(), self.line, self.column)
    }
}

/// How a data file's rows are counted in messages: CSV by file line (the
/// header is line 1), Parquet by 1-based row.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RowUnit {
    /// A line of a text file.
    Line,
    /// A 1-based row of a columnar file.
    Row,
}

impl RowUnit {
    /// The word for one.
    pub fn word(self) -> &'static str {
        match self {
            RowUnit::Line => "line",
            RowUnit::Row => "row",
        }
    }
}

/// The exit codes of the `anomark` binary, documented in the README.
pub mod exit {
    /// Success.
    pub const OK: i32 = 0;
    /// A verification found a difference (signature, hash or recomputed
    /// value), or `check` found problems.
    pub const VERIFY_FAILED: i32 = 1;
    /// A usage error or a spec error: nothing was read beyond the spec.
    pub const USAGE: i32 = 2;
    /// The data or the protocol refused the run (bad values, leakage, too few rows,
    /// a degenerate fit).
    pub const DATA: i32 = 3;
    /// A file could not be read or written, or a key is unusable.
    pub const IO: i32 = 4;
    /// The engine (DataFusion in process, or a cluster) failed or refused:
    /// unreachable, another anomark version, a failed task, a process that
    /// could not start.
    pub const ENGINE: i32 = 5;
    /// A bug in anomark.
    pub const INTERNAL: i32 = 70;
}

/// Everything that can stop anomark.
#[derive(Debug)]
#[non_exhaustive]
pub enum Error {
    /// The spec is malformed or inconsistent.
    Spec {
        /// Where the problem is.
        at: Location,
        /// The dotted field path, such as `split.protocol.seed` (empty for the root).
        field: String,
        /// What is wrong, lowercase, without a trailing period.
        message: String,
        /// The text of the offending line, for the caret rendering.
        line_text: String,
    },
    /// A data value or column is unusable. `lines` are file line numbers (the
    /// header is line 1).
    Data {
        /// The data file.
        path: PathBuf,
        /// The column, when one column is at fault.
        column: Option<String>,
        /// What is wrong.
        message: String,
        /// The first offending file lines, at most a handful.
        lines: Vec<u64>,
        /// How many rows are affected in all.
        total: usize,
        /// Whether `lines` are file lines or rows.
        unit: RowUnit,
    },
    /// The same row content sits in two splits.
    Leakage {
        /// The splits that share content, such as `validation` and `test`.
        splits: (String, String),
        /// How many distinct contents are shared.
        overlapping: usize,
        /// The first shared rows, one from each split, as file and line or row.
        first: (String, String),
    },
    /// The protocol cannot be followed with these rows.
    Protocol {
        /// What is missing or wrong.
        message: String,
    },
    /// A detector (or a feature's transform) cannot be fitted to the
    /// training rows.
    Fit {
        /// The detector; empty where none is being fitted yet (a transform,
        /// `check`'s preview), the feature set then wrapping the error.
        detector: String,
        /// What went wrong.
        message: String,
        /// The features involved.
        features: Vec<String>,
    },
    /// An external command used as a detector failed or broke its contract.
    Command {
        /// The candidate's name.
        name: String,
        /// What went wrong.
        message: String,
        /// The last lines the program wrote to its standard error.
        stderr: Vec<String>,
    },
    /// A file could not be read or written.
    Io {
        /// The file.
        path: PathBuf,
        /// What was being done, such as `reading` or `renaming into place`.
        action: &'static str,
        /// The cause.
        source: std::io::Error,
    },
    /// The CSV or Parquet reader refused a file's content for a reason other
    /// than a bad value.
    Csv {
        /// The data file.
        path: PathBuf,
        /// The file's format as the message names it: `CSV` or `Parquet`.
        format: &'static str,
        /// The reader's message.
        message: String,
    },
    /// The output directory cannot be used.
    Output {
        /// The directory.
        path: PathBuf,
        /// Why.
        message: String,
    },
    /// A key file is unusable.
    Key {
        /// The key file.
        path: PathBuf,
        /// Why.
        message: String,
    },
    /// A template failed to render.
    Template {
        /// The template name.
        name: String,
        /// 1-based line in the template, when known.
        line: Option<usize>,
        /// The engine's message.
        message: String,
    },
    /// `verify` found differences.
    Verify {
        /// The run directory.
        dir: PathBuf,
        /// Each difference, in the order found.
        problems: Vec<String>,
    },
    /// The command line asks for something anomark cannot do as asked (a
    /// missing option, or `init` unable to decide without more information).
    Usage {
        /// What is missing and how to give it.
        message: String,
    },
    /// An error met while working on one named feature set: the inner
    /// error, with the set it happened in (context added by wrapping).
    InFeatureSet {
        /// The feature set's name.
        set: String,
        /// What went wrong there.
        source: Box<Error>,
    },
    /// The engine running the protocol failed or refused.
    Engine {
        /// What was being done and the engine's reason.
        message: String,
    },
    /// An error met on one file: the inner error, with the file it
    /// concerns (context added by wrapping; the exit code is the inner
    /// error's).
    InFile {
        /// The file, as the user knows it.
        path: PathBuf,
        /// What went wrong there.
        source: Box<Error>,
    },
    /// An error met on one candidate (a feature set's detector): the inner
    /// error, with the candidate's name (context added by wrapping; the
    /// exit code is the inner error's).
    InCandidate {
        /// The candidate's name.
        name: String,
        /// What went wrong there.
        source: Box<Error>,
    },
    /// A bug.
    Internal {
        /// What went wrong.
        message: String,
    },
}

impl Error {
    /// The process exit code for this error.
    pub fn code(&self) -> i32 {
        match self {
            Error::Spec { .. } | Error::Usage { .. } => exit::USAGE,
            Error::Data { .. }
            | Error::Leakage { .. }
            | Error::Protocol { .. }
            | Error::Fit { .. }
            | Error::Command { .. }
            | Error::Csv { .. } => exit::DATA,
            Error::Io { .. }
            | Error::Output { .. }
            | Error::Key { .. }
            | Error::Template { .. } => exit::IO,
            Error::Verify { .. } => exit::VERIFY_FAILED,
            Error::Engine { .. } => exit::ENGINE,
            Error::InFeatureSet { source, .. }
            | Error::InFile { source, .. }
            | Error::InCandidate { source, .. } => source.code(),
            Error::Internal { .. } => exit::INTERNAL,
        }
    }

    /// Shorthand for an I/O error on `path`.
    pub fn io(path: impl Into<PathBuf>, action: &'static str, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            action,
            source,
        }
    }

    /// This error, met on the file `path`.
    pub fn in_file(self, path: impl Into<PathBuf>) -> Self {
        Error::InFile {
            path: path.into(),
            source: Box::new(self),
        }
    }

    /// This error, met on the candidate `name`.
    pub fn in_candidate(self, name: impl Into<String>) -> Self {
        Error::InCandidate {
            name: name.into(),
            source: Box::new(self),
        }
    }

    /// Shorthand for a bug report.
    pub fn internal(message: impl Into<String>) -> Self {
        Error::Internal {
            message: message.into(),
        }
    }
}

fn list(names: &[String]) -> String {
    names
        .iter()
        .map(|n| format!("`{n}`"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Places in words: `line 8`, `lines 8, 10` or `lines 8, 10 and 3 more`.
pub fn places(lines: &[u64], total: usize, unit: RowUnit) -> String {
    let word = unit.word();
    let shown = lines
        .iter()
        .map(|l| l.to_string())
        .collect::<Vec<_>>()
        .join(", ");
    if total > lines.len() {
        format!("{word}s {shown} and {} more", total - lines.len())
    } else if lines.len() == 1 {
        format!("{word} {shown}")
    } else {
        format!("{word}s {shown}")
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Error::Spec {
                at,
                field,
                message,
                line_text,
            } => {
                if field.is_empty() {
                    write!(f, "{at}: {message}")?;
                } else {
                    write!(f, "{at}: field `{field}`: {message}")?;
                }
                if !line_text.is_empty() {
                    let gutter = at.line.to_string().len();
                    let caret_pad: String = line_text
                        .chars()
                        .take(at.column.saturating_sub(1))
                        .map(|c| if c == '\t' { '\t' } else { ' ' })
                        .collect();
                    write!(
                        f,
                        "\n{:gutter$} |\n{} | {}\n{:gutter$} | {}^",
                        "", at.line, line_text, "", caret_pad
                    )?;
                }
                Ok(())
            }
            Error::Data {
                path,
                column,
                message,
                lines: l,
                total,
                unit,
            } => {
                write!(f, "{}: ", path.display())?;
                if let Some(c) = column {
                    write!(f, "column `{c}`: ")?;
                }
                write!(f, "{message}")?;
                if !l.is_empty() {
                    write!(f, " ({})", places(l, *total, *unit))?;
                }
                Ok(())
            }
            Error::Leakage {
                splits,
                overlapping,
                first,
            } => write!(
                f,
                "leakage: {overlapping} distinct row content(s) appear in both `{}` and `{}` \
                 (first: {} and {}); identical rows must share one split",
                splits.0, splits.1, first.0, first.1
            ),
            Error::InFeatureSet { set, source } => write!(f, "feature set `{set}`: {source}"),
            Error::InFile { path, source } => write!(f, "file `{}`: {source}", path.display()),
            Error::InCandidate { name, source } => write!(f, "candidate `{name}`: {source}"),
            Error::Protocol { message } => write!(f, "{message}"),
            Error::Usage { message } => write!(f, "{message}"),
            Error::Fit {
                detector,
                message,
                features,
            } => {
                // No detector yet (a transform, `check`'s preview): the
                // caller wraps the error in its feature set.
                if !detector.is_empty() {
                    write!(f, "detector `{detector}`: ")?;
                }
                write!(f, "{message}")?;
                if !features.is_empty() {
                    write!(f, " (features: {})", list(features))?;
                }
                Ok(())
            }
            Error::Command {
                name,
                message,
                stderr,
            } => {
                write!(f, "command `{name}`: {message}")?;
                if !stderr.is_empty() {
                    write!(f, "; the last lines of its standard error:")?;
                    for l in stderr {
                        write!(f, "\n  | {l}")?;
                    }
                }
                Ok(())
            }
            Error::Io {
                path,
                action,
                source,
            } => write!(f, "{action} `{}`: {source}", path.display()),
            Error::Csv {
                path,
                format,
                message,
            } => {
                write!(f, "{}: cannot read as {format}: {message}", path.display())
            }
            Error::Output { path, message } => {
                write!(f, "output `{}`: {message}", path.display())
            }
            Error::Key { path, message } => write!(f, "key `{}`: {message}", path.display()),
            Error::Template {
                name,
                line,
                message,
            } => match line {
                Some(l) => write!(f, "template `{name}` line {l}: {message}"),
                None => write!(f, "template `{name}`: {message}"),
            },
            Error::Verify { dir, problems } => {
                write!(
                    f,
                    "verification of `{}` failed: {} problem(s)",
                    dir.display(),
                    problems.len()
                )?;
                for p in problems {
                    write!(f, "\n  - {p}")?;
                }
                Ok(())
            }
            Error::Engine { message } => write!(f, "engine: {message}"),
            Error::Internal { message } => write!(
                f,
                "internal error: {message}; this is a bug in anomark, please report it \
                 with the spec and the command that produced it"
            ),
        }
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        match self {
            Error::Io { source, .. } => Some(source),
            Error::InFeatureSet { source, .. }
            | Error::InFile { source, .. }
            | Error::InCandidate { source, .. } => Some(source.as_ref()),
            _ => None,
        }
    }
}

/// The crate's result type.
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// What a file system entry is, in words, for a refusal.
fn kind_of(t: std::fs::FileType) -> &'static str {
    #[cfg(unix)]
    {
        use std::os::unix::fs::FileTypeExt;
        if t.is_char_device() {
            return "a character device";
        }
        if t.is_block_device() {
            return "a block device";
        }
        if t.is_fifo() {
            return "a fifo";
        }
        if t.is_socket() {
            return "a socket";
        }
    }
    if t.is_dir() {
        "a folder"
    } else {
        "not a regular file"
    }
}

/// Refuses `meta` (of `path`) unless it is a regular file: a device, fifo or
/// socket would be read without end (`/dev/zero`) or block (a fifo), and a
/// folder is not a file. A file problem ([`exit::IO`]).
pub fn check_regular(path: &Path, action: &'static str, meta: &std::fs::Metadata) -> Result<()> {
    if meta.is_file() {
        return Ok(());
    }
    let kind = kind_of(meta.file_type());
    let what = if kind == "not a regular file" {
        "not a regular file".to_string()
    } else {
        format!("{kind}, not a regular file")
    };
    Err(Error::io(
        path,
        action,
        std::io::Error::new(
            std::io::ErrorKind::InvalidInput,
            format!("{what}; anomark reads regular files only"),
        ),
    ))
}

/// Refuses `path` unless it names a regular file (links followed): a path
/// that cannot be looked up gives its own cause (missing, a dangling or
/// looping link), anything else [`check_regular`]'s refusal.
pub fn require_regular(path: &Path, action: &'static str) -> Result<()> {
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, action, e))?;
    check_regular(path, action, &meta)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spec_error_renders_caret_under_column() {
        let e = Error::Spec {
            at: Location {
                file: "spec.yaml".into(),
                line: 14,
                column: 7,
            },
            field: "split.protocol.seed".into(),
            message: "expected an integer, found `seven`".into(),
            line_text: "  seed: seven".into(),
        };
        assert_eq!(
            e.to_string(),
            "spec.yaml:14:7: field `split.protocol.seed`: expected an integer, found `seven`\n   |\n14 |   seed: seven\n   |       ^"
        );
        assert_eq!(e.code(), exit::USAGE);
    }

    #[test]
    fn a_usage_error_is_the_message_and_exit_code_2() {
        let e = Error::Usage {
            message: "`run` needs `--key PATH`".into(),
        };
        assert_eq!(e.to_string(), "`run` needs `--key PATH`");
        assert_eq!(e.code(), exit::USAGE);
    }

    #[test]
    fn a_wrapper_keeps_the_inner_message_whole_and_its_exit_code() {
        let inner = || Error::Fit {
            detector: String::new(),
            message: "the score of line 4 is not a number".into(),
            features: vec![],
        };
        let e = inner().in_candidate("a/gaussian");
        assert_eq!(
            e.to_string(),
            "candidate `a/gaussian`: the score of line 4 is not a number"
        );
        assert_eq!(e.code(), exit::DATA);
        let e = Error::io("d.csv", "reading", std::io::ErrorKind::NotFound.into()).in_file("d.csv");
        assert!(e.to_string().starts_with("file `d.csv`: reading `d.csv`: "));
        assert_eq!(e.code(), exit::IO);
        assert!(std::error::Error::source(&e).is_some());
    }

    #[test]
    fn data_error_names_lines() {
        let e = Error::Data {
            path: "d.csv".into(),
            column: Some("x".into()),
            message: "value is not a number".into(),
            lines: vec![3, 9],
            total: 4,
            unit: RowUnit::Line,
        };
        assert_eq!(
            e.to_string(),
            "d.csv: column `x`: value is not a number (lines 3, 9 and 2 more)"
        );
    }
}
