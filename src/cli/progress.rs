//! The progress display of a fit, read from the library's live pass counters
//! ([`PassCounter`]) by a ticker thread: on a terminal a bar per pass (pass number, rows,
//! rows/s, MB/s, ETA, the current objective); otherwise a plain line every
//! [`LINE_EVERY`] while a long pass runs. The passes themselves only add to atomics.

use std::io::IsTerminal;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};

use outcore::pass::PassCounter;

use super::output;

/// How often a plain progress line is printed during a long pass (stderr not a terminal).
pub const LINE_EVERY: Duration = Duration::from_secs(10);

/// Environment variable that changes [`LINE_EVERY`] (seconds, e.g. `0.5`; for logs of
/// batch jobs and for the tests).
pub const LINE_EVERY_VAR: &str = "OUTCORE_PROGRESS_SECONDS";

/// The interval of the plain progress lines: [`LINE_EVERY`] unless [`LINE_EVERY_VAR`]
/// holds a positive number of seconds.
fn line_every() -> Duration {
    std::env::var(LINE_EVERY_VAR)
        .ok()
        .and_then(|v| v.trim().parse::<f64>().ok())
        .filter(|s| s.is_finite() && *s > 0.0 && *s < 1e9)
        .map_or(LINE_EVERY, Duration::from_secs_f64)
}

/// How often the ticker looks at the counters.
const TICK: Duration = Duration::from_millis(100);

/// A running progress display; dropped or [`Ticker::finish`]ed, it stops and clears.
pub struct Ticker {
    counter: Arc<PassCounter>,
    /// The objective of the last accepted iteration, as f64 bits (NaN: none yet).
    objective: Arc<AtomicU64>,
    stop: Arc<AtomicBool>,
    bar: Option<ProgressBar>,
    handle: Option<JoinHandle<()>>,
}

impl Ticker {
    /// Starts the display, or `None` with `--quiet`.
    pub fn start(quiet: bool) -> Option<Ticker> {
        if quiet {
            return None;
        }
        let counter = Arc::new(PassCounter::default());
        let objective = Arc::new(AtomicU64::new(f64::NAN.to_bits()));
        let stop = Arc::new(AtomicBool::new(false));
        let bar = std::io::stderr().is_terminal().then(|| {
            // Hidden until the first pass starts (else it shows an empty 0/0 bar).
            let bar = ProgressBar::with_draw_target(Some(0), ProgressDrawTarget::hidden());
            let style = ProgressStyle::with_template(
                "pass {prefix:>3} [{bar:28}] {percent:>3}%  {human_pos}/{human_len} rows  ETA {eta}  {msg}",
            )
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> ");
            bar.set_style(style);
            bar
        });
        let handle = {
            let (counter, objective, stop, bar) = (
                counter.clone(),
                objective.clone(),
                stop.clone(),
                bar.clone(),
            );
            std::thread::Builder::new()
                .name("progress".into())
                .spawn(move || tick(&counter, &objective, &stop, bar.as_ref()))
                .ok()
        };
        Some(Ticker {
            counter,
            objective,
            stop,
            bar,
            handle,
        })
    }

    /// The counters to hand to the library ([`outcore::fit::Control::progress`]).
    pub fn counter(&self) -> Arc<PassCounter> {
        self.counter.clone()
    }

    /// Records the objective of the last accepted iteration.
    pub fn set_objective(&self, f: f64) {
        self.objective.store(f.to_bits(), Ordering::Relaxed);
    }

    /// Prints a line on stderr without tearing the bar.
    pub fn note(&self, text: &str) {
        match &self.bar {
            Some(bar) => bar.suspend(|| output::note(text)),
            None => output::note(text),
        }
    }

    /// Stops the ticker and clears the bar.
    pub fn finish(mut self) {
        self.halt();
    }

    fn halt(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(h) = self.handle.take() {
            let _ = h.join();
        }
        if let Some(bar) = self.bar.take() {
            bar.finish_and_clear();
        }
    }
}

impl Drop for Ticker {
    fn drop(&mut self) {
        self.halt();
    }
}

fn objective_text(objective: &AtomicU64) -> String {
    let f = f64::from_bits(objective.load(Ordering::Relaxed));
    if f.is_nan() {
        String::new()
    } else {
        format!("objective {}", output::sig(f, 10))
    }
}

fn tick(
    counter: &PassCounter,
    objective: &AtomicU64,
    stop: &AtomicBool,
    bar: Option<&ProgressBar>,
) {
    let every = line_every();
    let mut pass = 0;
    let mut pass_started = Instant::now();
    let mut last_line = Instant::now();
    while !stop.load(Ordering::Relaxed) {
        std::thread::sleep(TICK);
        let now_pass = counter.passes.load(Ordering::Relaxed);
        let done = counter.rows_done.load(Ordering::Relaxed);
        let total = counter.rows_total.load(Ordering::Relaxed);
        let bytes = counter.bytes_total.load(Ordering::Relaxed);
        if now_pass == 0 {
            continue;
        }
        if now_pass != pass {
            pass = now_pass;
            pass_started = Instant::now();
            last_line = pass_started;
            if let Some(bar) = bar {
                if bar.is_hidden() {
                    bar.set_draw_target(ProgressDrawTarget::stderr());
                }
                bar.reset();
                bar.set_length(total);
                bar.set_prefix(pass.to_string());
            }
        }
        let seconds = pass_started.elapsed().as_secs_f64().max(1e-9);
        let rows_per_second = done as f64 / seconds;
        let megabytes_per_second = if total > 0 {
            rows_per_second * bytes as f64 / total as f64 / 1e6
        } else {
            0.0
        };
        match bar {
            Some(bar) => {
                bar.set_position(done.min(total));
                bar.set_message(format!(
                    "{:.2}M rows/s  {megabytes_per_second:.1} MB/s  {}",
                    rows_per_second / 1e6,
                    objective_text(objective)
                ));
            }
            None => {
                if last_line.elapsed() >= every && done < total {
                    last_line = Instant::now();
                    let eta = if rows_per_second > 0.0 {
                        format!("{:.0}s", (total - done) as f64 / rows_per_second)
                    } else {
                        "?".into()
                    };
                    let line = format!(
                        "pass {pass}: {done} of {total} rows ({:.0}%), {rows_per_second:.0} rows/s, {megabytes_per_second:.1} MB/s, ETA {eta} {}",
                        100.0 * done as f64 / total.max(1) as f64,
                        objective_text(objective)
                    );
                    output::note(line.trim_end());
                }
            }
        }
    }
}
