//! `outcore fit`, `predict` and `demo`.

use std::path::Path;

use serde_json::json;

use outcore::atomic;
use outcore::demo::{write_demo, DemoOptions};
use outcore::fit::{self, FitEvent, FitOutcome};
use outcore::model::Model;
use outcore::predict;
use outcore::run_dir::RunDir;
use outcore::source::Source;
use outcore::{Error, Result};

use super::args::{DemoArgs, FitArgs, PredictArgs};
use super::config::{self, FitPlan};
use super::output;
use super::{EXIT_NOT_CONVERGED, EXIT_OK};

/// `outcore fit`.
pub fn run(args: FitArgs) -> Result<i32> {
    let plan = config::resolve(&args)?;
    atomic::check_output(&plan.out, "model")?;
    let quiet = args.quiet;
    let mut run_dir: Option<RunDir> = None;
    let mut run_error: Option<Error> = None;
    let FitPlan {
        data,
        settings,
        out,
        run,
    } = &plan;
    let outcome = fit::fit(data, settings, &mut |event| match event {
        FitEvent::Statistics {
            summary,
            features,
            seconds,
        } => {
            if !quiet {
                output::note(&format!(
                    "read {} rows ({} features, weight sum {}) in {seconds:.2}s; fitting {} with {} shards on {} threads",
                    summary.rows,
                    features,
                    summary.weight_sum,
                    settings.request.loss.as_str(),
                    settings.shard_count(),
                    settings.threads
                ));
                if summary.skipped_target > 0 {
                    output::note(&format!(
                        "skipped {} rows with a null target",
                        summary.skipped_target
                    ));
                }
            }
            match RunDir::create(run, data, out, settings) {
                Ok(d) => run_dir = Some(d),
                Err(e) => run_error = Some(e),
            }
        }
        FitEvent::Warning(w) => output::warning(w),
        FitEvent::Iteration(r) => {
            if !quiet {
                output::note(&format!(
                    "iter {:>4}  passes {:>4}  objective {:.12e}  max|g| {:.3e}  step {:.3e}  {:.2}s",
                    r.iteration, r.passes, r.objective, r.gradient_max, r.step, r.seconds
                ));
            }
            if let Some(d) = run_dir.as_mut() {
                if let Err(e) = d.log(r) {
                    run_error.get_or_insert(e);
                }
            }
        }
    });
    if let Some(e) = run_error {
        return Err(e);
    }
    let FitOutcome { model, stop, .. } = outcome?;
    model.save(out)?;
    let f = &model.fit;
    if !quiet {
        let verdict = if stop.is_converged() {
            "converged"
        } else {
            "stopped before converging"
        };
        output::note(&format!(
            "{verdict} ({}) after {} iterations, {} passes, {:.2}s; objective {:.12e}, max|g| {:.3e}",
            f.stop, f.iterations, f.passes, f.seconds, f.objective, f.gradient_max
        ));
        if let Some(m) = &f.message {
            output::note(m);
        }
        output::note(&format!("model written to {}", out.display()));
    }
    if args.json {
        let summary = json!({
            "model": out,
            "run": run,
            "stop": f.stop,
            "converged": stop.is_converged(),
            "message": f.message,
            "objective": f.objective,
            "gradient_max": f.gradient_max,
            "iterations": f.iterations,
            "passes": f.passes,
            "seconds": f.seconds,
            "rows": f.rows,
            "features": model.features.len(),
        });
        output::line(&summary.to_string());
    }
    Ok(if stop.is_converged() {
        EXIT_OK
    } else {
        EXIT_NOT_CONVERGED
    })
}

/// `outcore predict`.
pub fn predict(args: PredictArgs) -> Result<i32> {
    let model = Model::load(&args.model)?;
    let source = Source::open(&args.data)?;
    atomic::check_output(&args.out, "scores")?;
    let summary = predict::predict(&model, &source, &args.keep, &args.out)?;
    output::note(&format!(
        "scored {} rows from {} files into {}",
        summary.rows,
        summary.files,
        args.out.display()
    ));
    Ok(EXIT_OK)
}

/// `outcore demo`.
pub fn demo(args: DemoArgs) -> Result<i32> {
    if args.out.exists() && !args.out.is_dir() {
        return Err(Error::usage(format!(
            "{} is a file; name a directory with --out",
            args.out.display()
        )));
    }
    let options = DemoOptions {
        rows: args.rows,
        seed: args.seed,
        rows_per_file: args.rows_per_file,
        ..DemoOptions::default()
    };
    let summary = write_demo(Path::new(&args.out), &options)?;
    output::note(&format!(
        "wrote {} rows in {} files to {}; the true coefficients are in {}",
        summary.rows,
        summary.files.len(),
        args.out.display(),
        summary.truth_path.display()
    ));
    Ok(EXIT_OK)
}
