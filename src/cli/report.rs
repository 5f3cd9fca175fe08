//! `outcore report`.

use outcore::Result;

use super::args::ReportArgs;
use super::{output, EXIT_OK};

/// `outcore report`.
pub fn run(args: ReportArgs) -> Result<i32> {
    let written = outcore::report::write_report(&args.dir, &args.out, args.top)?;
    for w in &written.notes {
        output::note(w);
    }
    output::note(&format!("report written to {}", args.out.display()));
    Ok(EXIT_OK)
}
