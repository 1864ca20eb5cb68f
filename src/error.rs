//! The library's error type.
//!
//! Every variant names the file it concerns, so the binary can print one line that
//! tells the user what went wrong and where.

use std::path::PathBuf;

/// Errors raised by tamis.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// An operating-system error while reading, writing or renaming a file.
    #[error("{path}: {cause}")]
    Io {
        /// The file or folder concerned.
        path: PathBuf,
        /// The underlying error (part of the message, so not repeated as a source).
        cause: std::io::Error,
    },

    /// A file does not start with the magic bytes of the kind expected.
    #[error("{path}: not a tamis {expected} file (bad magic bytes)")]
    BadMagic {
        /// The file concerned.
        path: PathBuf,
        /// What kind of file was expected.
        expected: &'static str,
    },

    /// A file's format version is not one this build reads.
    #[error(
        "{path}: format version {got} is not supported (this build reads {oldest}..={newest})"
    )]
    Version {
        /// The file concerned.
        path: PathBuf,
        /// Oldest version this build reads.
        oldest: u32,
        /// Newest version this build reads.
        newest: u32,
        /// The version found in the file.
        got: u32,
    },

    /// A file is shorter (or longer) than its header says.
    #[error("{path}: file is damaged or truncated: {what} (expected {expected} bytes, got {got})")]
    Size {
        /// The file concerned.
        path: PathBuf,
        /// Which part has the wrong size.
        what: String,
        /// Size required.
        expected: u64,
        /// Size found.
        got: u64,
    },

    /// A stored checksum does not match the data.
    #[error("{path}: checksum mismatch in {section} (stored {expected:016x}, computed {got:016x}): the file is damaged")]
    Checksum {
        /// The file concerned.
        path: PathBuf,
        /// Which section failed.
        section: String,
        /// The checksum stored in the file.
        expected: u64,
        /// The checksum computed from the data.
        got: u64,
    },

    /// A file's structure is inconsistent (bad offsets, indices out of range, bad JSON...).
    #[error("{path}: damaged file: {what}")]
    Corrupt {
        /// The file concerned.
        path: PathBuf,
        /// What is wrong.
        what: String,
    },

    /// Options or settings that cannot be used together or are out of range.
    #[error("{0}")]
    Invalid(String),

    /// Settings that contradict those stored in an existing file.
    #[error("{path}: {what}")]
    Mismatch {
        /// The file whose settings disagree.
        path: PathBuf,
        /// What disagrees, with both values.
        what: String,
    },

    /// Data that cannot support what was asked of it (a validation split with
    /// no positive rows, a single class).
    #[error("{path}: {what}")]
    Insufficient {
        /// The dataset or file concerned.
        path: PathBuf,
        /// What is missing.
        what: String,
    },

    /// Too many input lines could not be used.
    #[error("{bad} of {seen} input records are unusable ({fraction:.2}% > --max-bad-fraction {limit}%); nothing was written to the dataset")]
    TooManyBad {
        /// Unusable records.
        bad: u64,
        /// All records seen.
        seen: u64,
        /// bad / seen in percent.
        fraction: f64,
        /// The limit in percent.
        limit: f64,
    },
}

/// Result with the library's [`Error`].
pub type Result<T, E = Error> = std::result::Result<T, E>;

/// Attach a path to an `io::Error`.
pub(crate) trait IoContext<T> {
    /// Wrap the error in [`Error::Io`] naming `path`.
    fn at(self, path: impl Into<PathBuf>) -> Result<T>;
}

impl<T> IoContext<T> for std::io::Result<T> {
    fn at(self, path: impl Into<PathBuf>) -> Result<T> {
        self.map_err(|cause| Error::Io {
            path: path.into(),
            cause,
        })
    }
}
