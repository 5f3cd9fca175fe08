//! The `outcore` command: parse, run, map the outcome onto an exit code.

mod cli;

fn main() {
    std::process::exit(cli::main());
}
