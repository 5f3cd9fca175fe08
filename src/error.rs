//! The library's error type.
//!
//! Every fallible library call returns [`Result`]. An [`Error`] carries a [`ErrorKind`]
//! that says which part of the input or the machine was at fault, and a message written
//! as one sentence for the person running the tool: it names the file, column or row and
//! says what to do. The binary prints the message once and maps the kind onto an exit
//! code; the library itself never prints.

use std::fmt;

/// What went wrong, coarsely; the binary maps it onto an exit code.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ErrorKind {
    /// The command line or configuration is wrong (unknown column, bad value of a flag).
    Usage,
    /// The data do not fit the request: schema, types, values (NaN, labels, nulls).
    Data,
    /// A model, checkpoint or cache file is corrupt, foreign or of another version.
    Format,
    /// A saved run does not match what is asked of it (data or settings changed).
    Mismatch,
    /// Reading or writing a file failed.
    Io,
    /// The work was interrupted by a signal.
    Interrupted,
    /// A bug or an impossible state inside the library.
    Internal,
}

/// The library's error: a kind and a message for the user.
#[derive(Debug, Clone)]
pub struct Error {
    kind: ErrorKind,
    message: String,
}

impl Error {
    /// An error of `kind` with a user-facing `message`.
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Error {
            kind,
            message: message.into(),
        }
    }

    /// Bad usage: a flag, a setting or a column name.
    pub fn usage(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Usage, message)
    }

    /// Bad data: a value, a type or a schema.
    pub fn data(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Data, message)
    }

    /// A corrupt or foreign file of ours (model, checkpoint, cache).
    pub fn format(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Format, message)
    }

    /// A saved run does not match the request.
    pub fn mismatch(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Mismatch, message)
    }

    /// An I/O failure on `path`.
    pub fn io(path: &std::path::Path, err: std::io::Error) -> Self {
        Self::new(
            ErrorKind::Io,
            format!("cannot access {}: {err}", path.display()),
        )
    }

    /// Interrupted by a signal.
    pub fn interrupted() -> Self {
        Self::new(ErrorKind::Interrupted, "interrupted")
    }

    /// A bug: something the library believed impossible.
    pub fn internal(message: impl Into<String>) -> Self {
        Self::new(ErrorKind::Internal, message)
    }

    /// The kind of failure.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }

    /// The user-facing message.
    pub fn message(&self) -> &str {
        &self.message
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl std::error::Error for Error {}

/// The library's result type.
pub type Result<T, E = Error> = std::result::Result<T, E>;
