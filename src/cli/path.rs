//! `outcore path`: fits a grid of penalty strengths and chooses one by the holdout loss.
//!
//! Everything is written into a staging directory beside `--out-dir` and moved into
//! place only when the path has finished, so a failed or interrupted path never touches
//! an earlier `--out-dir`. Layout of the finished directory:
//!
//! ```text
//! DIR/path.json        the table (format outcore-path/1) with the choice
//! DIR/path.csv         the same table as CSV
//! DIR/chosen.json      the chosen strength's model
//! DIR/models/s001.json one model per strength, strongest first
//! DIR/runs/s001/       each strength's run directory (settings, log.jsonl, checkpoint)
//! DIR/runs/blocks-*.ocache  the block cache every strength reads (unless --cache/--no-cache)
//! ```

use std::path::{Path, PathBuf};

use serde_json::{json, Value};

use outcore::fit::{Control, FitEvent, FitSettings};
use outcore::path::{self, Grid, PathEvent, PathOutcome, PathSettings, PenaltyKind, Rule};
use outcore::run_dir::RunDir;
use outcore::{atomic, Error, ErrorKind, Result};

use super::args::PathArgs;
use super::config;
use super::fit::{absolute, cancel_on_signals};
use super::output;
use super::progress::Ticker;
use super::{EXIT_INTERRUPTED, EXIT_NOT_CONVERGED, EXIT_OK};

/// Format of `path.json`.
pub const PATH_FORMAT: &str = "outcore-path/1";

/// A sibling of `dir` named `NAME.SUFFIX-PID`.
fn sibling(dir: &Path, suffix: &str) -> PathBuf {
    let mut name = dir
        .file_name()
        .map(|n| n.to_os_string())
        .unwrap_or_default();
    name.push(format!(".{suffix}-{}", std::process::id()));
    dir.with_file_name(name)
}

/// `outcore path`.
pub fn run(args: PathArgs) -> Result<i32> {
    let fit_args = &args.fit;
    for (given, flag) in [
        (fit_args.ridge.is_some(), "--ridge"),
        (fit_args.lasso.is_some(), "--lasso"),
        (fit_args.out.is_some(), "--out"),
        (fit_args.run.is_some(), "--run"),
        (fit_args.inference, "--inference"),
    ] {
        if given {
            return Err(Error::usage(format!(
                "outcore path sets the penalty itself and writes into --out-dir; leave out {flag} (fit the chosen strength again with outcore fit for --inference)"
            )));
        }
    }
    let out_dir = absolute(&args.out_dir);
    if out_dir.exists() && !out_dir.is_dir() {
        return Err(Error::usage(format!(
            "{} is a file; name a directory with --out-dir",
            out_dir.display()
        )));
    }
    let kind = PenaltyKind::parse(args.penalty.as_deref().unwrap_or("lasso"), args.mix)?;
    let grid_text = match (&args.grid, kind) {
        (Some(g), _) => g.clone(),
        (None, PenaltyKind::Ridge) => {
            return Err(Error::usage(
                "a ridge path needs --grid START:END:COUNT (e.g. --grid 1:1e-4:13); only lasso and elastic net start automatically",
            ))
        }
        (None, _) => "auto:20".to_string(),
    };
    let grid = Grid::parse(&grid_text, args.span)?;
    let mut resolved_args = fit_args.clone();
    resolved_args.out = Some(out_dir.join("chosen.json"));
    let mut plan = config::resolve(&resolved_args)?;
    if plan.settings.ridge != 0.0 || plan.settings.lasso != 0.0 {
        return Err(Error::usage(
            "the settings file sets ridge or lasso; outcore path sets the penalty itself, so remove them from the file",
        ));
    }
    plan.data = plan
        .data
        .iter()
        .map(|d| absolute(Path::new(d)).to_string_lossy().into_owned())
        .collect();
    let settings = PathSettings {
        kind,
        grid,
        warm: !args.cold,
        rule: if args.one_se { Rule::OneSe } else { Rule::Best },
    };
    let staging = sibling(&out_dir, "partial");
    let ticker = Ticker::start(fit_args.quiet);
    let control = Control {
        progress: ticker.as_ref().map(Ticker::counter),
        cancel: cancel_on_signals(),
        checkpoint_dir: Some(staging.join("runs")),
        checkpoint_every: Some(plan.checkpoint_every),
    };
    let mut writer = Writer {
        quiet: fit_args.quiet,
        out_dir: &out_dir,
        staging: &staging,
        data: &plan.data,
        base: &plan.settings,
        kind,
        created: false,
        run_dir: None,
        count: 0,
        ticker,
    };
    let outcome = path::run_path(&plan.data, &plan.settings, &settings, &control, &mut |e| {
        writer.event(e)
    });
    if let Some(t) = writer.ticker.take() {
        t.finish();
    }
    let outcome = match outcome {
        Ok(o) => o,
        Err(e) if e.kind() == ErrorKind::Interrupted => {
            writer.run_dir = None;
            if writer.created {
                output::note(&format!(
                    "interrupted; the strengths finished so far and the checkpoint of the one in progress are in {} ({} is unchanged); run the same command again to fit the path",
                    staging.display(),
                    out_dir.display()
                ));
            } else {
                output::note("interrupted before the first strength; nothing was written");
            }
            return Ok(EXIT_INTERRUPTED);
        }
        Err(e) => {
            writer.run_dir = None;
            if writer.created {
                let _ = std::fs::remove_dir_all(&staging);
            }
            return Err(e);
        }
    };
    let finished = (|| -> Result<()> {
        let record = path_record(&plan.data, &plan.settings, &settings, &outcome);
        let text = serde_json::to_string_pretty(&record)
            .map_err(|e| Error::internal(format!("cannot encode the path table: {e}")))?;
        atomic::write(&staging.join("path.json"), text.as_bytes())?;
        atomic::write(&staging.join("path.csv"), csv(&outcome).as_bytes())?;
        outcome.steps[outcome.chosen]
            .model
            .save(&staging.join("chosen.json"))?;
        move_into_place(&staging, &out_dir)
    })();
    if let Err(e) = finished {
        let _ = std::fs::remove_dir_all(&staging);
        return Err(e);
    }
    let all_converged = outcome.steps.iter().all(|s| s.stop.is_converged());
    if fit_args.json {
        output::line(&summary_json(&out_dir, &settings, &outcome).to_string());
    } else {
        for line in table(&outcome) {
            output::line(&line);
        }
    }
    if !fit_args.quiet {
        let chosen = &outcome.steps[outcome.chosen];
        output::note(&format!(
            "chose {} {} (strength {} of {}, {}); {} passes in all; written to {}",
            kind.as_str(),
            output::sig(chosen.strength, 6),
            chosen.index + 1,
            outcome.steps.len(),
            settings.rule.as_str(),
            outcome.passes,
            out_dir.display()
        ));
        if !all_converged {
            output::note("some strengths stopped before converging (see the stop column)");
        }
    }
    Ok(if all_converged {
        EXIT_OK
    } else {
        EXIT_NOT_CONVERGED
    })
}

/// Puts the finished staging directory where `out_dir` is; an earlier `out_dir` is
/// renamed aside first and removed only once the new one is in place.
fn move_into_place(staging: &Path, out_dir: &Path) -> Result<()> {
    let aside = if out_dir.exists() {
        let aside = sibling(out_dir, "replaced");
        std::fs::rename(out_dir, &aside).map_err(|e| Error::io(out_dir, e))?;
        Some(aside)
    } else {
        None
    };
    if let Err(e) = std::fs::rename(staging, out_dir) {
        if let Some(aside) = &aside {
            let _ = std::fs::rename(aside, out_dir);
        }
        return Err(Error::io(out_dir, e));
    }
    if let Some(parent) = out_dir.parent() {
        atomic::sync_dir(parent);
    }
    if let Some(aside) = aside {
        let _ = std::fs::remove_dir_all(aside);
    }
    Ok(())
}

/// Writes each strength's run directory and model as the path goes.
struct Writer<'a> {
    quiet: bool,
    out_dir: &'a Path,
    staging: &'a Path,
    data: &'a [String],
    base: &'a FitSettings,
    kind: PenaltyKind,
    /// The staging directory exists (the data were accepted).
    created: bool,
    run_dir: Option<RunDir>,
    count: usize,
    ticker: Option<Ticker>,
}

impl Writer<'_> {
    fn say(&self, text: &str) {
        if self.quiet {
            return;
        }
        match &self.ticker {
            Some(t) => t.note(text),
            None => output::note(text),
        }
    }

    fn event(&mut self, event: PathEvent<'_>) -> Result<()> {
        match event {
            PathEvent::Fit(
                _,
                FitEvent::Statistics {
                    summary,
                    features,
                    seconds,
                },
            ) => {
                self.say(&format!(
                    "read {} rows ({} features, {} held out) in {seconds:.2}s",
                    summary.rows, features, summary.held_out_rows
                ));
            }
            PathEvent::Fit(_, FitEvent::Warning(w)) => self.say(&format!("warning: {w}")),
            PathEvent::Fit(_, FitEvent::Note(n)) => self.say(n),
            PathEvent::Fit(_, FitEvent::Iteration(r)) => {
                if let Some(t) = &self.ticker {
                    t.set_objective(r.objective);
                }
                if let Some(d) = self.run_dir.as_mut() {
                    d.log(r)?;
                }
            }
            PathEvent::Fit(_, FitEvent::Resumed { .. }) => {}
            PathEvent::Grid {
                strengths,
                auto_start,
            } => {
                if self.staging.exists() {
                    std::fs::remove_dir_all(self.staging)
                        .map_err(|e| Error::io(self.staging, e))?;
                }
                std::fs::create_dir_all(self.staging.join("models"))
                    .map_err(|e| Error::io(self.staging, e))?;
                self.created = true;
                self.count = strengths.len();
                let from = auto_start
                    .map(|s| {
                        format!(
                            " (automatic start {}: every coefficient zero)",
                            output::sig(s, 6)
                        )
                    })
                    .unwrap_or_default();
                self.say(&format!(
                    "{} strengths of {} from {} to {}{from}",
                    strengths.len(),
                    self.kind.as_str(),
                    output::sig(strengths[0], 6),
                    output::sig(strengths[strengths.len() - 1], 6)
                ));
            }
            PathEvent::Begin { index, strength } => {
                let name = path::step_dir_name(index);
                let mut settings = self.base.clone();
                (settings.ridge, settings.lasso) = self.kind.split(strength);
                let model = self.out_dir.join("models").join(format!("{name}.json"));
                self.run_dir = Some(RunDir::create(
                    &self.staging.join("runs").join(&name),
                    self.data,
                    &model,
                    &settings,
                )?);
            }
            PathEvent::Done(step) => {
                self.run_dir = None;
                let name = path::step_dir_name(step.index);
                step.model
                    .save(&self.staging.join("models").join(format!("{name}.json")))?;
                let f = &step.model.fit;
                self.say(&format!(
                    "strength {:>3}/{}  {} {:<12}  holdout {:<14}  nonzero {:>5}  iterations {:>4}  passes {:>4}  {}",
                    step.index + 1,
                    self.count,
                    self.kind.as_str(),
                    output::sig(step.strength, 6),
                    step.holdout_loss.map_or("-".to_string(), |h| output::sig(h, 8)),
                    step.nonzero,
                    f.iterations,
                    f.passes,
                    f.stop
                ));
            }
        }
        Ok(())
    }
}

fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map_or(Value::Null, Value::Number)
}

fn opt(v: Option<f64>) -> Value {
    v.map_or(Value::Null, num)
}

/// The measure's name for a loss family.
pub fn measure_name(loss: outcore::objective::Loss) -> &'static str {
    use outcore::objective::Loss;
    match loss {
        Loss::Logistic | Loss::Softmax => "holdout log-loss",
        Loss::Squared => "holdout half squared error",
        Loss::Poisson => "holdout Poisson loss (e^z - y z)",
    }
}

/// `path.json`.
fn path_record(
    data: &[String],
    base: &FitSettings,
    settings: &PathSettings,
    outcome: &PathOutcome,
) -> Value {
    let holdout = outcome.steps[0].model.fit.holdout.as_ref();
    json!({
        "format": PATH_FORMAT,
        "data": data,
        "target": base.request.target,
        "loss": base.request.loss.as_str(),
        "penalty": settings.kind.as_str(),
        "mix": match settings.kind { PenaltyKind::Elastic { mix } => num(mix), _ => Value::Null },
        "warm_start": settings.warm,
        "rule": settings.rule.as_str(),
        "measure": measure_name(base.request.loss),
        "standard_error": "s/sqrt(W), s^2 = sum w (l - mean)^2 / (W - 1) over held-out rows, W = their weight",
        "auto_start": opt(outcome.auto_start),
        "holdout": holdout.map(|h| json!({
            "fraction": h.fraction, "key": h.key, "rows": h.rows, "weight": h.weight
        })),
        "best": outcome.best,
        "chosen": outcome.chosen,
        "chosen_model": "chosen.json",
        "passes": outcome.passes,
        "fit_passes": outcome.fit_passes,
        "seconds": outcome.seconds,
        "steps": outcome.steps.iter().map(|s| {
            let name = path::step_dir_name(s.index);
            let f = &s.model.fit;
            json!({
                "index": s.index,
                "strength": s.strength,
                "ridge": s.model.penalty.ridge,
                "lasso": s.model.penalty.lasso,
                "holdout_loss": opt(s.holdout_loss),
                "holdout_se": opt(s.holdout_se),
                "nonzero": s.nonzero,
                "stop": f.stop,
                "objective": num(f.objective),
                "gradient_max": num(f.gradient_max),
                "iterations": f.iterations,
                "passes": f.passes,
                "seconds": f.seconds,
                "model": format!("models/{name}.json"),
                "run": format!("runs/{name}"),
            })
        }).collect::<Vec<_>>(),
    })
}

/// `path.csv`.
fn csv(outcome: &PathOutcome) -> String {
    let mut out = String::from(
        "index,strength,ridge,lasso,holdout_loss,holdout_se,nonzero,stop,iterations,passes,best,chosen\n",
    );
    let o = |v: Option<f64>| v.map_or(String::new(), |v| format!("{v}"));
    for s in &outcome.steps {
        let f = &s.model.fit;
        out.push_str(&format!(
            "{},{},{},{},{},{},{},{},{},{},{},{}\n",
            s.index,
            s.strength,
            s.model.penalty.ridge,
            s.model.penalty.lasso,
            o(s.holdout_loss),
            o(s.holdout_se),
            s.nonzero,
            f.stop,
            f.iterations,
            f.passes,
            u8::from(s.index == outcome.best),
            u8::from(s.index == outcome.chosen),
        ));
    }
    out
}

/// The table printed at the end.
fn table(outcome: &PathOutcome) -> Vec<String> {
    let mut lines = vec![format!(
        "{:>4}  {:>12}  {:>14}  {:>12}  {:>7}  {:>5}  {:>6}  {}",
        "#", "strength", "holdout loss", "std error", "nonzero", "iters", "passes", "stop"
    )];
    for s in &outcome.steps {
        let mark = match (s.index == outcome.chosen, s.index == outcome.best) {
            (true, true) => "  <- best, chosen",
            (true, false) => "  <- chosen",
            (false, true) => "  <- best",
            _ => "",
        };
        lines.push(format!(
            "{:>4}  {:>12}  {:>14}  {:>12}  {:>7}  {:>5}  {:>6}  {}{mark}",
            s.index + 1,
            output::sig(s.strength, 6),
            s.holdout_loss.map_or("-".into(), |v| output::sig(v, 8)),
            s.holdout_se.map_or("-".into(), |v| output::sig(v, 4)),
            s.nonzero,
            s.model.fit.iterations,
            s.model.fit.passes,
            s.model.fit.stop
        ));
    }
    lines
}

/// The `--json` summary.
fn summary_json(out_dir: &Path, settings: &PathSettings, outcome: &PathOutcome) -> Value {
    let chosen = &outcome.steps[outcome.chosen];
    json!({
        "out_dir": out_dir,
        "penalty": settings.kind.as_str(),
        "rule": settings.rule.as_str(),
        "strengths": outcome.steps.len(),
        "best": outcome.best,
        "chosen": outcome.chosen,
        "chosen_strength": chosen.strength,
        "chosen_ridge": chosen.model.penalty.ridge,
        "chosen_lasso": chosen.model.penalty.lasso,
        "chosen_holdout_loss": opt(chosen.holdout_loss),
        "chosen_model": out_dir.join("chosen.json"),
        "converged": outcome.steps.iter().all(|s| s.stop.is_converged()),
        "passes": outcome.passes,
        "fit_passes": outcome.fit_passes,
        "seconds": outcome.seconds,
    })
}
