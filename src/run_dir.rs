//! The run directory of a fit: the settings used (`settings.json`) and the
//! per-iteration log as JSON lines (`log.jsonl`). Checkpoints go here too.

use std::fs::{self, File, OpenOptions};
use std::io::Write;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::fit::{FitSettings, IterationRecord};
use crate::{atomic, Error, Result};

/// Name of the settings file in a run directory.
pub const SETTINGS_FILE: &str = "settings.json";
/// Name of the iteration log in a run directory.
pub const LOG_FILE: &str = "log.jsonl";

/// An open run directory.
#[derive(Debug)]
pub struct RunDir {
    path: PathBuf,
    log: File,
}

/// Format of `settings.json`.
pub const RUN_FORMAT: &str = "outcore-run/1";

#[derive(Deserialize)]
struct OwnedSettingsRecord {
    format: String,
    data: Vec<String>,
    model: PathBuf,
    settings: FitSettings,
}

#[derive(Serialize)]
struct SettingsRecord<'a> {
    format: &'static str,
    data: &'a [String],
    model: &'a Path,
    settings: &'a FitSettings,
}

impl RunDir {
    /// Creates (or reuses) the directory, writes the settings and starts a fresh log.
    pub fn create(
        path: &Path,
        data: &[String],
        model: &Path,
        settings: &FitSettings,
    ) -> Result<RunDir> {
        if path.exists() && !path.is_dir() {
            return Err(Error::usage(format!(
                "the run directory {} is a file; name a directory with --run",
                path.display()
            )));
        }
        fs::create_dir_all(path).map_err(|e| Error::io(path, e))?;
        let record = SettingsRecord {
            format: RUN_FORMAT,
            data,
            model,
            settings,
        };
        let text = serde_json::to_string_pretty(&record)
            .map_err(|e| Error::internal(format!("cannot encode the settings: {e}")))?;
        atomic::write(&path.join(SETTINGS_FILE), text.as_bytes())?;
        let log_path = path.join(LOG_FILE);
        let log = OpenOptions::new()
            .create(true)
            .write(true)
            .truncate(true)
            .open(&log_path)
            .map_err(|e| Error::io(&log_path, e))?;
        Ok(RunDir {
            path: path.to_path_buf(),
            log,
        })
    }

    /// Opens the run directory of a fit being resumed: keeps the log lines of the first
    /// `iterations` iterations and appends after them.
    pub fn reopen(path: &Path, iterations: u64) -> Result<RunDir> {
        let log_path = path.join(LOG_FILE);
        let text = fs::read_to_string(&log_path).unwrap_or_default();
        let kept: String = text
            .lines()
            .filter(|line| {
                serde_json::from_str::<IterationRecord>(line)
                    .is_ok_and(|r| r.iteration <= iterations)
            })
            .flat_map(|line| [line, "\n"])
            .collect();
        atomic::write(&log_path, kept.as_bytes())?;
        let log = OpenOptions::new()
            .append(true)
            .open(&log_path)
            .map_err(|e| Error::io(&log_path, e))?;
        Ok(RunDir {
            path: path.to_path_buf(),
            log,
        })
    }

    /// Reads the data paths, model path and settings a fit in `path` started with.
    pub fn read_settings(path: &Path) -> Result<(Vec<String>, PathBuf, FitSettings)> {
        let file = path.join(SETTINGS_FILE);
        let text = fs::read(&file).map_err(|e| {
            if e.kind() == std::io::ErrorKind::NotFound {
                Error::usage(format!(
                    "{} is not the run directory of a fit (it has no {SETTINGS_FILE}); give the MODEL.run directory that `outcore fit` made",
                    path.display()
                ))
            } else {
                Error::io(&file, e)
            }
        })?;
        let record: OwnedSettingsRecord = serde_json::from_slice(&text)
            .map_err(|e| Error::format(format!("{} is damaged: {e}", file.display())))?;
        if record.format != RUN_FORMAT {
            return Err(Error::format(format!(
                "{} is of format '{}'; this build reads '{RUN_FORMAT}'",
                file.display(),
                record.format
            )));
        }
        Ok((record.data, record.model, record.settings))
    }

    /// The directory.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Appends one iteration to the log.
    pub fn log(&mut self, record: &IterationRecord) -> Result<()> {
        let mut line = serde_json::to_string(record)
            .map_err(|e| Error::internal(format!("cannot encode a log line: {e}")))?;
        line.push('\n');
        self.log
            .write_all(line.as_bytes())
            .map_err(|e| Error::io(&self.path.join(LOG_FILE), e))
    }
}
