//! `--config RUN.toml`: the fit flags as a settings file, merged under the flags into
//! one [`FitPlan`].

use std::path::{Path, PathBuf};
use std::time::Duration;

use outcore::features::hashing::{self, SparseRequest};
use outcore::features::{FeatureRequest, MissingPolicy};
use outcore::fit::{CacheSetting, FitSettings};
use outcore::holdout::HoldoutSettings;
use outcore::objective::Loss;
use outcore::settings_file::{self, SettingsFile};
use outcore::{Error, Result};

use super::args::FitArgs;

/// A fit fully resolved from flags and settings file.
#[derive(Debug, Clone)]
pub struct FitPlan {
    /// Data paths.
    pub data: Vec<String>,
    /// Settings of the fit.
    pub settings: FitSettings,
    /// Model file to write.
    pub out: PathBuf,
    /// Run directory.
    pub run: PathBuf,
    /// Checkpoints inside a pass.
    pub checkpoint_every: Duration,
}

fn relative_to(base: &Path, p: &str) -> String {
    let path = Path::new(p);
    if path.is_absolute() {
        p.to_string()
    } else {
        base.join(path).to_string_lossy().into_owned()
    }
}

/// The sparse part of a request from --categorical, --cross, --hash-bits and
/// --sparse-vector (none when none of them is given).
fn sparse_request(
    categorical: Option<Vec<String>>,
    crosses: Vec<String>,
    bits: Option<u32>,
    vectors: Vec<String>,
) -> Result<Option<SparseRequest>> {
    let columns = categorical.unwrap_or_default();
    if columns.is_empty() && crosses.is_empty() && vectors.is_empty() {
        if bits.is_some() {
            return Err(Error::usage(
                "--hash-bits needs something to hash: --categorical COL,... or --cross A*B",
            ));
        }
        return Ok(None);
    }
    Ok(Some(SparseRequest {
        bits: bits.unwrap_or(hashing::DEFAULT_BITS),
        columns: columns
            .iter()
            .map(|c| hashing::parse_part(c, "--categorical"))
            .collect::<Result<_>>()?,
        crosses: crosses
            .iter()
            .map(|c| hashing::parse_cross(c))
            .collect::<Result<_>>()?,
        vectors: vectors
            .iter()
            .map(|v| hashing::parse_vector(v))
            .collect::<Result<_>>()?,
    }))
}

/// Resolves flags over the settings file into a plan.
pub fn resolve(args: &FitArgs) -> Result<FitPlan> {
    let (config, base) = match &args.config {
        Some(path) => {
            let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
            (settings_file::read(path)?, base)
        }
        None => (SettingsFile::default(), PathBuf::new()),
    };
    let data = if !args.data.is_empty() {
        args.data.clone()
    } else {
        config
            .data
            .unwrap_or_default()
            .iter()
            .map(|p| relative_to(&base, p))
            .collect()
    };
    if data.is_empty() {
        return Err(Error::usage(
            "no data given: pass --data PATH (or data = [...] in the settings file)",
        ));
    }
    let target = args
        .target
        .clone()
        .or(config.target)
        .ok_or_else(|| Error::usage("no target given: pass --target COL"))?;
    let out = match (&args.out, config.out) {
        (Some(o), _) => o.clone(),
        (None, Some(o)) => base.join(o),
        (None, None) => return Err(Error::usage("no model path given: pass --out MODEL.json")),
    };
    let loss = Loss::parse(
        args.loss
            .as_deref()
            .or(config.loss.as_deref())
            .unwrap_or("logistic"),
    )?;
    let missing = MissingPolicy::parse(
        args.missing
            .as_deref()
            .or(config.missing.as_deref())
            .unwrap_or("error"),
    )?;
    let request = FeatureRequest {
        target,
        weight: args.weight.clone().or(config.weight),
        features: args.features.clone().or(config.features),
        loss,
        missing,
        skip_missing_target: args.skip_missing_target
            || config.skip_missing_target.unwrap_or(false),
        standardize: !args.no_standardize && config.standardize.unwrap_or(true),
        sparse: sparse_request(
            args.categorical.clone().or(config.categorical),
            if args.cross.is_empty() {
                config.cross.unwrap_or_default()
            } else {
                args.cross.clone()
            },
            args.hash_bits.or(config.hash_bits),
            if args.sparse_vector.is_empty() {
                config.sparse_vector.unwrap_or_default()
            } else {
                args.sparse_vector.clone()
            },
        )?,
    };
    let mut settings = FitSettings::new(request);
    settings.ridge = args.ridge.or(config.ridge).unwrap_or(0.0);
    settings.lasso = args.lasso.or(config.lasso).unwrap_or(0.0);
    settings.tol = args.tol.or(config.tol).unwrap_or(settings.tol);
    settings.max_passes = args.max_passes.or(config.max_passes);
    settings.max_seconds = args.max_seconds.or(config.max_seconds);
    settings.history = args.history.or(config.history).unwrap_or(settings.history);
    settings.threads = args.threads.or(config.threads).unwrap_or(settings.threads);
    settings.shards = args.shards.or(config.shards);
    settings.block_rows = args
        .block_rows
        .or(config.block_rows)
        .unwrap_or(settings.block_rows);
    settings.inference = args.inference || config.inference.unwrap_or(false);
    if let Some(mb) = args.gradient_memory.or(config.gradient_memory) {
        settings.gradient_memory_mb = mb;
    }
    settings.inference_max_features = args
        .inference_max_features
        .or(config.inference_max_features)
        .unwrap_or(settings.inference_max_features);
    let split_key = args.split_key.clone().or(config.split_key);
    let patience = args.holdout_patience.or(config.holdout_patience);
    settings.holdout = match args.holdout.or(config.holdout) {
        Some(fraction) => Some(HoldoutSettings {
            fraction,
            key: split_key,
            patience,
        }),
        None if split_key.is_some() => {
            return Err(Error::usage(
                "--split-key needs --holdout FRACTION (the share of keys to hold out)",
            ))
        }
        None if patience.is_some() => {
            return Err(Error::usage(
                "--holdout-patience needs --holdout FRACTION (the rows whose loss it watches)",
            ))
        }
        None => None,
    };
    if settings.block_rows == 0 {
        return Err(Error::usage("--block-rows must be at least 1"));
    }
    let no_cache = args.no_cache || config.no_cache.unwrap_or(false);
    settings.cache = match (args.cache.clone(), config.cache.map(|c| base.join(c))) {
        (Some(_), _) | (None, Some(_)) if no_cache => {
            return Err(Error::usage(
                "--cache DIR and --no-cache contradict each other; give one of them",
            ))
        }
        (Some(dir), _) | (None, Some(dir)) => {
            CacheSetting::Dir(std::path::absolute(&dir).unwrap_or(dir))
        }
        (None, None) if no_cache => CacheSetting::Off,
        (None, None) => CacheSetting::Run,
    };
    settings.f32_values = match args.precision.as_deref().or(config.precision.as_deref()) {
        None | Some("stored") => false,
        Some("f32") => true,
        Some(other) => {
            return Err(Error::usage(format!(
                "unknown --precision '{other}'; choose stored or f32"
            )))
        }
    };
    settings.validate()?;
    let run = match (&args.run, config.run) {
        (Some(r), _) => r.clone(),
        (None, Some(r)) => base.join(r),
        (None, None) => default_run_dir(&out),
    };
    let checkpoint_every = parse_duration(
        args.checkpoint_every
            .as_deref()
            .or(config.checkpoint_every.as_deref())
            .unwrap_or("5m"),
    )?;
    Ok(FitPlan {
        data,
        settings,
        out,
        run,
        checkpoint_every,
    })
}

/// Parses `250ms`, `90s`, `5m`, `2h` or a plain number of seconds.
pub fn parse_duration(text: &str) -> Result<Duration> {
    let t = text.trim();
    let (number, unit) = match t.find(|c: char| c.is_ascii_alphabetic()) {
        Some(i) => (&t[..i], &t[i..]),
        None => (t, "s"),
    };
    let scale = match unit {
        "ms" => 1e-3,
        "s" => 1.0,
        "m" | "min" => 60.0,
        "h" => 3600.0,
        _ => f64::NAN,
    };
    let value: f64 = number.trim().parse().unwrap_or(f64::NAN);
    let seconds = value * scale;
    if seconds.is_finite() && seconds > 0.0 {
        Ok(Duration::from_secs_f64(seconds))
    } else {
        Err(Error::usage(format!(
            "'{text}' is not a duration; write for example 250ms, 90s, 5m or 1h"
        )))
    }
}

/// `MODEL.run` beside `MODEL.json`.
pub fn default_run_dir(out: &Path) -> PathBuf {
    let stem = out
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "model".into());
    out.with_file_name(format!("{stem}.run"))
}
