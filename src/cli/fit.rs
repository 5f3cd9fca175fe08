//! `outcore fit`, `predict` and `demo`.

use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use signal_hook::consts::{SIGINT, SIGTERM};

use serde_json::json;

use outcore::atomic;
use outcore::demo::{write_demo, DemoOptions};
use outcore::fit::{
    self, Control, FitEvent, FitOutcome, FitSettings, ResumeOverrides, ResumeSource,
};
use outcore::model::Model;
use outcore::predict;
use outcore::run_dir::RunDir;
use outcore::source::Source;
use outcore::{Error, ErrorKind, Result};

use super::args::{DemoArgs, FitArgs, PredictArgs, ResumeArgs};
use super::config::{self, FitPlan};
use super::output;
use super::progress::Ticker;
use super::{EXIT_INTERRUPTED, EXIT_NOT_CONVERGED, EXIT_OK};

/// Installs SIGINT/SIGTERM handling: the first signal sets the returned flag (the fit
/// checkpoints and stops at the next block boundary); a second one exits at once.
pub(super) fn cancel_on_signals() -> Option<Arc<AtomicBool>> {
    let flag = Arc::new(AtomicBool::new(false));
    for signal in [SIGINT, SIGTERM] {
        // The conditional exit is registered first so that it only fires on a second signal.
        if signal_hook::flag::register_conditional_shutdown(signal, EXIT_INTERRUPTED, flag.clone())
            .is_err()
            || signal_hook::flag::register(signal, flag.clone()).is_err()
        {
            output::warning("cannot install the signal handler; Ctrl-C will stop the fit without a final checkpoint");
            return None;
        }
    }
    Some(flag)
}

pub(super) fn absolute(path: &Path) -> PathBuf {
    std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf())
}

/// Printing and logging of fit events, shared by `fit` and `resume`.
struct Reporter<'a> {
    quiet: bool,
    run: &'a Path,
    run_dir: Option<RunDir>,
    run_error: Option<Error>,
    settings: &'a FitSettings,
    data: &'a [String],
    model: &'a Path,
    /// The earlier fit's run directory, set aside while this fit has accepted no
    /// iteration yet: put back if the fit fails before one (bad input never destroys an
    /// earlier run), deleted once the new run holds an accepted iteration.
    set_aside: Option<PathBuf>,
    /// An iteration was accepted (or the fit ended): the new run directory stands.
    accepted: bool,
    /// The progress display (none with --quiet).
    ticker: Option<Ticker>,
    /// Block caches moved from the set-aside run directory into the new one.
    moved_caches: Vec<OsString>,
}

/// Moves an existing, non-empty run directory out of the way (a rename, so it costs
/// nothing and keeps every byte and time stamp); `None` when there is nothing to keep.
fn set_aside_run_dir(run: &Path) -> Result<Option<PathBuf>> {
    let non_empty = std::fs::read_dir(run).is_ok_and(|mut d| d.next().is_some());
    if !non_empty {
        return Ok(None);
    }
    let mut name = run
        .file_name()
        .map(|n| n.to_os_string())
        .unwrap_or_default();
    name.push(format!(".replaced-{}", std::process::id()));
    let aside = run.with_file_name(name);
    std::fs::rename(run, &aside).map_err(|e| Error::io(run, e))?;
    Ok(Some(aside))
}

/// Moves the block caches of one run directory into another: from an earlier run
/// directory (set aside) into the new one, so that a refit on the same data (another
/// penalty) reuses them, and back when the new fit fails.
/// Returns the names moved.
fn keep_block_caches(from: &Path, to: &Path, only: Option<&[OsString]>) -> Vec<OsString> {
    let mut moved = Vec::new();
    let Ok(entries) = std::fs::read_dir(from) else {
        return moved;
    };
    for entry in entries.flatten() {
        let path = entry.path();
        let Some(name) = path.file_name() else {
            continue;
        };
        let wanted = match only {
            Some(names) => names.iter().any(|n| n == name),
            None => path
                .extension()
                .is_some_and(|e| e == outcore::cache::EXTENSION),
        };
        if wanted && std::fs::rename(&path, to.join(name)).is_ok() {
            moved.push(name.to_os_string());
        }
    }
    moved
}

impl Reporter<'_> {
    /// A progress line on stderr (beside the bar when there is one).
    fn say(&self, text: &str) {
        match &self.ticker {
            Some(t) => t.note(text),
            None => output::note(text),
        }
    }

    /// The new run directory stands: the earlier one set aside is deleted.
    fn keep_new_run(&mut self) {
        self.accepted = true;
        if let Some(aside) = self.set_aside.take() {
            let _ = std::fs::remove_dir_all(aside);
        }
    }

    /// The fit failed before accepting an iteration: the new run directory goes and the
    /// earlier one comes back unchanged.
    fn restore_old_run(&mut self) {
        if self.accepted {
            return;
        }
        if let Some(aside) = self.set_aside.take() {
            self.run_dir = None;
            // The earlier run's block caches were moved into the new directory: back.
            keep_block_caches(self.run, &aside, Some(&self.moved_caches));
            let _ = std::fs::remove_dir_all(self.run);
            if std::fs::rename(&aside, self.run).is_err() {
                output::warning(&format!(
                    "the earlier run directory is kept as {}",
                    aside.display()
                ));
            }
        } else if self.run_dir.take().is_some() {
            let _ = std::fs::remove_dir_all(self.run);
        }
    }

    fn event(&mut self, event: FitEvent<'_>) {
        match event {
            FitEvent::Statistics {
                summary,
                features,
                seconds,
            } => {
                if !self.quiet {
                    self.say(&format!(
                        "read {} rows ({} features, weight sum {}) in {seconds:.2}s; fitting {} with {} shards on {} threads",
                        summary.rows,
                        features,
                        summary.weight_sum,
                        self.settings.request.loss.as_str(),
                        self.settings.shard_count(),
                        self.settings.threads
                    ));
                    if summary.skipped_target > 0 {
                        self.say(&format!(
                            "skipped {} rows with a null target",
                            summary.skipped_target
                        ));
                    }
                }
                match set_aside_run_dir(self.run).and_then(|aside| {
                    self.set_aside = aside;
                    RunDir::create(self.run, self.data, self.model, self.settings)
                }) {
                    Ok(d) => {
                        self.run_dir = Some(d);
                        if let Some(aside) = &self.set_aside {
                            self.moved_caches = keep_block_caches(aside, self.run, None);
                        }
                    }
                    Err(e) => self.run_error = Some(e),
                }
            }
            FitEvent::Resumed {
                iteration,
                passes,
                pass_in_progress,
            } => {
                if !self.quiet {
                    let within = if pass_in_progress {
                        ", continuing the pass in progress"
                    } else {
                        ""
                    };
                    self.say(&format!(
                        "resuming after iteration {iteration} ({passes} passes done{within}) on {} threads",
                        self.settings.threads
                    ));
                }
                match RunDir::reopen(self.run, iteration) {
                    Ok(d) => self.run_dir = Some(d),
                    Err(e) => self.run_error = Some(e),
                }
            }
            FitEvent::Warning(w) => self.say(&format!("warning: {w}")),
            FitEvent::Note(n) => {
                if !self.quiet {
                    self.say(n);
                }
            }
            FitEvent::Iteration(r) => {
                if !self.accepted {
                    self.keep_new_run();
                }
                if let Some(t) = &self.ticker {
                    t.set_objective(r.objective);
                }
                if !self.quiet {
                    let holdout = r
                        .holdout_loss
                        .map(|h| format!("  holdout {}", output::sig(h, 8)))
                        .unwrap_or_default();
                    self.say(&format!(
                        "iter {:>4}  passes {:>4}  objective {:<16}  max|g| {}  step {:<9}{holdout}  {:.2}s",
                        r.iteration,
                        r.passes,
                        output::sig(r.objective, 12),
                        output::sci(r.gradient_max, 3),
                        output::sig(r.step, 4),
                        r.seconds
                    ));
                }
                if let Some(d) = self.run_dir.as_mut() {
                    if let Err(e) = d.log(r) {
                        self.run_error.get_or_insert(e);
                    }
                }
            }
        }
    }

    /// Writes the model and prints the summary; the exit status.
    fn finish(mut self, outcome: Result<FitOutcome>, json: bool) -> Result<i32> {
        if let Some(t) = self.ticker.take() {
            t.finish();
        }
        match &outcome {
            Err(e) if e.kind() != ErrorKind::Interrupted => self.restore_old_run(),
            _ => self.keep_new_run(),
        }
        let outcome = match outcome {
            Err(e) if e.kind() == ErrorKind::Interrupted => {
                output::note(&format!(
                    "interrupted; the last checkpoint is in {}. Continue with: outcore resume {}",
                    self.run.display(),
                    self.run.display()
                ));
                return Ok(EXIT_INTERRUPTED);
            }
            other => other?,
        };
        if let Some(e) = self.run_error {
            return Err(e);
        }
        let FitOutcome {
            model, stop, cache, ..
        } = outcome;
        let peak_resident = outcore::memory::peak_resident();
        let peak_anon = outcore::memory::peak_anon();
        model.save(self.model)?;
        let f = &model.fit;
        if !self.quiet {
            let verdict = if stop.is_converged() {
                "converged".to_string()
            } else {
                format!("stopped before converging ({})", f.stop)
            };
            output::note(&format!(
                "{verdict} after {} iterations, {} passes, {:.2}s; objective {}, max|g| {}",
                f.iterations,
                f.passes,
                f.seconds,
                output::sig(f.objective, 12),
                output::sci(f.gradient_max, 3)
            ));
            if let Some(m) = &f.message {
                output::note(m);
            }
            let mb = |v: Option<u64>| v.map_or("unknown".to_string(), outcore::cache::megabytes);
            output::note(&format!(
                "passes read {}; peak memory {} resident ({} anonymous; the rest is file-backed, such as mapped cache pages)",
                match &cache.path {
                    Some(p) => format!("the block cache {} ({})", p.display(), outcore::cache::megabytes(cache.bytes)),
                    None => "Parquet".to_string(),
                },
                mb(peak_resident),
                mb(peak_anon)
            ));
            output::note(&format!("model written to {}", self.model.display()));
        }
        if json {
            let summary = json!({
                "model": self.model,
                "run": self.run,
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
                "holdout_loss": f.holdout.as_ref().and_then(|h| h.loss),
                "cache": cache,
                "memory": {
                    "peak_resident_bytes": peak_resident,
                    "peak_anonymous_bytes": peak_anon,
                },
            });
            output::line(&summary.to_string());
        }
        Ok(if stop.is_converged() {
            EXIT_OK
        } else {
            EXIT_NOT_CONVERGED
        })
    }
}

/// `outcore fit`.
pub fn run(args: FitArgs) -> Result<i32> {
    let mut plan = config::resolve(&args)?;
    atomic::check_output(&plan.out, "model")?;
    plan.out = absolute(&plan.out);
    plan.run = absolute(&plan.run);
    if plan.run.exists() && !plan.run.is_dir() {
        return Err(Error::usage(format!(
            "the run directory {} is a file; name a directory with --run",
            plan.run.display()
        )));
    }
    plan.data = plan
        .data
        .iter()
        .map(|d| absolute(Path::new(d)).to_string_lossy().into_owned())
        .collect();
    let FitPlan {
        data,
        settings,
        out,
        run,
        checkpoint_every,
    } = &plan;
    let ticker = Ticker::start(args.quiet);
    let control = Control {
        progress: ticker.as_ref().map(Ticker::counter),
        cancel: cancel_on_signals(),
        checkpoint_dir: Some(run.clone()),
        checkpoint_every: Some(*checkpoint_every),
    };
    let mut reporter = Reporter {
        quiet: args.quiet,
        run,
        run_dir: None,
        run_error: None,
        settings,
        data,
        model: out,
        set_aside: None,
        accepted: false,
        ticker,
        moved_caches: Vec::new(),
    };
    let outcome = fit::fit(data, settings, &control, &mut |e| reporter.event(e));
    reporter.finish(outcome, args.json)
}

/// `outcore resume`.
pub fn resume(args: ResumeArgs) -> Result<i32> {
    let run = absolute(&args.dir);
    let (data, model, settings) = RunDir::read_settings(&run)?;
    atomic::check_output(&model, "model")?;
    let overrides = ResumeOverrides {
        max_passes: args.max_passes,
        max_seconds: args.max_seconds,
        threads: args.threads,
    };
    let ticker = Ticker::start(args.quiet);
    let control = Control {
        progress: ticker.as_ref().map(Ticker::counter),
        cancel: cancel_on_signals(),
        checkpoint_dir: Some(run.clone()),
        checkpoint_every: Some(config::parse_duration(
            args.checkpoint_every.as_deref().unwrap_or("5m"),
        )?),
    };
    let mut shown = settings.clone();
    if let Some(t) = args.threads {
        shown.threads = t;
    }
    let started_with = ResumeSource {
        data: data.clone(),
        settings,
    };
    let mut reporter = Reporter {
        quiet: args.quiet,
        run: &run,
        run_dir: None,
        run_error: None,
        settings: &shown,
        data: &data,
        model: &model,
        set_aside: None,
        accepted: true,
        ticker,
        moved_caches: Vec::new(),
    };
    let outcome = fit::resume(&run, &started_with, &overrides, &control, &mut |e| {
        reporter.event(e)
    });
    reporter.finish(outcome, args.json)
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
