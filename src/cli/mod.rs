//! Command-line definitions and the mapping of commands onto library calls. Only this
//! layer prints and chooses exit codes (DESIGN §5).

mod args;
mod config;
mod evaluate;
mod fit;
mod inference;
mod inspect;
mod output;
mod path;
mod progress;
mod report;

use clap::Parser;

use outcore::ErrorKind;

pub use args::{Cli, Command};

/// Exit status: converged.
pub const EXIT_OK: i32 = 0;
/// Exit status: stopped before converging; the model was written and marked so.
pub const EXIT_NOT_CONVERGED: i32 = 1;
/// Exit status: bad usage or bad input; nothing was written.
pub const EXIT_BAD_INPUT: i32 = 2;
/// Exit status: an internal error.
pub const EXIT_INTERNAL: i32 = 3;
/// Exit status: interrupted by a signal after a checkpoint was saved.
pub const EXIT_INTERRUPTED: i32 = 130;

/// Runs the command line and returns the exit status.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let code = if e.use_stderr() {
                EXIT_BAD_INPUT
            } else {
                EXIT_OK
            };
            let _ = e.print();
            return code;
        }
    };
    let outcome = match cli.command {
        Command::Fit(args) => fit::run(*args),
        Command::Resume(args) => fit::resume(args),
        Command::Predict(args) => fit::predict(args),
        Command::Evaluate(args) => evaluate::run(args),
        Command::Inference(args) => inference::run(args),
        Command::Inspect(args) => inspect::run(args),
        Command::Demo(args) => fit::demo(args),
        Command::Path(args) => path::run(*args),
        Command::Report(args) => report::run(args),
    };
    match outcome {
        Ok(code) => code,
        Err(e) => {
            output::error(&e);
            exit_code(e.kind())
        }
    }
}

/// The exit status of a library error.
pub fn exit_code(kind: ErrorKind) -> i32 {
    match kind {
        ErrorKind::Internal => EXIT_INTERNAL,
        ErrorKind::Interrupted => EXIT_INTERRUPTED,
        _ => EXIT_BAD_INPUT,
    }
}
