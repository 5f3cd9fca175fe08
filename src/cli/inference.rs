//! `outcore inference`: standard errors for a model fitted without `--inference`.

use std::path::Path;

use outcore::fit::default_threads;
use outcore::inference;
use outcore::model::Model;
use outcore::source::Source;
use outcore::{atomic, Error, Result};

use super::args::InferenceArgs;
use super::output;
use super::EXIT_OK;

/// `outcore inference`.
pub fn run(args: InferenceArgs) -> Result<i32> {
    let mut model = Model::load(&args.model)?;
    if model.sparse.is_some() {
        return Err(outcore::Error::usage(format!(
            "{} has hashed or sparse features; standard errors are computed for dense models only",
            args.model.display()
        )));
    }
    let out = args.out.clone().unwrap_or_else(|| args.model.clone());
    atomic::check_output(&out, "model")?;
    let data: Vec<String> = args
        .data
        .iter()
        .map(|d| {
            std::path::absolute(Path::new(d))
                .map(|p| p.to_string_lossy().into_owned())
                .unwrap_or_else(|_| d.clone())
        })
        .collect();
    let source = Source::open(&data)?;
    let threads = args.threads.unwrap_or_else(default_threads);
    let result = inference::for_model(&model, &source, threads, args.inference_max_features)?;
    let Some(table) = result.table else {
        return Err(Error::data(format!(
            "no standard errors for {}: {}",
            args.model.display(),
            result
                .warning
                .unwrap_or_else(|| "the table could not be computed".into())
        )));
    };
    if let Some(w) = &result.warning {
        output::warning(w);
    }
    model.inference = Some(table);
    model.fit.passes += result.passes;
    model.save(&out)?;
    output::note(&format!(
        "standard errors added with one pass over {} rows; model written to {} (see outcore inspect)",
        source.rows(),
        out.display()
    ));
    Ok(EXIT_OK)
}
