//! The run directory of a fit: the settings used (`settings.json`) and the
//! per-iteration log as JSON lines (`log.jsonl`). Checkpoints go here too.

use std::fs::{self, File, OpenOptions};
use std::io::Write;
use std::path::{Path, PathBuf};

use serde::Serialize;

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
            format: "outcore-run/1",
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
