//! The flags of every command, each with its help text.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

/// Fit regularized generalized linear models on Parquet data larger than memory.
#[derive(Debug, Parser)]
#[command(name = "outcore", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Fit a model on Parquet data and write the model file.
    Fit(Box<FitArgs>),
    /// Continue a fit from the checkpoint in its run directory.
    Resume(ResumeArgs),
    /// Score Parquet data with a model and write the scores as Parquet.
    Predict(PredictArgs),
    /// Measure a model on Parquet data with known targets (log-loss, AUC, RMSE, ...).
    Evaluate(EvaluateArgs),
    /// Add standard errors to a model fitted without --inference (one pass over its
    /// training data).
    Inference(InferenceArgs),
    /// Show a model file as a readable summary.
    Inspect(InspectArgs),
    /// Write the invented demo data set (a grocery-delivery order log).
    Demo(DemoArgs),
    /// Fit a grid of penalty strengths, strong to weak, and choose one by the loss of
    /// held-out rows (needs --holdout).
    #[command(
        mut_arg("ridge", |a| a.hide(true)),
        mut_arg("lasso", |a| a.hide(true)),
        mut_arg("out", |a| a.hide(true)),
        mut_arg("run", |a| a.hide(true)),
        mut_arg("inference", |a| a.hide(true)),
        mut_arg("inference_max_features", |a| a.hide(true))
    )]
    Path(Box<PathArgs>),
    /// Write one self-contained HTML report (charts as inline SVG) of a fit's or a
    /// path's run directory.
    Report(ReportArgs),
}

/// Flags of `outcore fit`. Every flag can also be set in a `--config` TOML file under
/// the same name with underscores (`max_passes = 50`); flags override the file.
#[derive(Debug, Args, Default, Clone)]
pub struct FitArgs {
    /// Settings file (TOML) with the same keys as these flags; relative paths in it are
    /// relative to the file.
    #[arg(long, value_name = "RUN.toml")]
    pub config: Option<PathBuf>,
    /// Parquet files, directories of them, or glob patterns.
    #[arg(long, num_args = 1.., value_name = "PATH")]
    pub data: Vec<String>,
    /// The column to predict.
    #[arg(long, value_name = "COL")]
    pub target: Option<String>,
    /// A column of frequency weights (a row of weight 3 counts as three rows).
    #[arg(long, value_name = "COL")]
    pub weight: Option<String>,
    /// Feature columns (default: every numeric or boolean column but target and weight).
    #[arg(long, value_delimiter = ',', value_name = "COL,...")]
    pub features: Option<Vec<String>>,
    /// Loss family: logistic, squared, poisson or softmax (default logistic).
    #[arg(long, value_name = "LOSS")]
    pub loss: Option<String>,
    /// Ridge strength: adds ridge/2 · ‖β‖² (intercept not penalized).
    #[arg(long, value_name = "X", allow_negative_numbers = true)]
    pub ridge: Option<f64>,
    /// Lasso strength: adds lasso · ‖β‖₁ (fitted by OWL-QN; exact zeros).
    #[arg(long, value_name = "X", allow_negative_numbers = true)]
    pub lasso: Option<f64>,
    /// Converged when max |gradient| ≤ tol · max(1, |objective|) (default 1e-6).
    #[arg(long, value_name = "X", allow_negative_numbers = true)]
    pub tol: Option<f64>,
    /// Most full data passes, the statistics pass included.
    #[arg(long, value_name = "N")]
    pub max_passes: Option<u64>,
    /// Wall-clock budget in seconds.
    #[arg(long, value_name = "S", allow_negative_numbers = true)]
    pub max_seconds: Option<f64>,
    /// L-BFGS history pairs (default 10).
    #[arg(long, value_name = "M")]
    pub history: Option<usize>,
    /// Threads for the data passes (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Shards the data are cut into (default: the thread count); results depend on the
    /// shard count, never on the thread count.
    #[arg(long, value_name = "N")]
    pub shards: Option<usize>,
    /// Rows per block of a pass (default 8192).
    #[arg(long, value_name = "N")]
    pub block_rows: Option<usize>,
    /// Null feature values: error (default) or mean (impute the training mean and add an
    /// indicator feature `COL.missing`).
    #[arg(long, value_name = "POLICY")]
    pub missing: Option<String>,
    /// Skip (and count) rows whose target is null instead of refusing them.
    #[arg(long)]
    pub skip_missing_target: bool,
    /// Fit and penalize on the raw scale instead of standardized features.
    #[arg(long)]
    pub no_standardize: bool,
    /// After the fit, compute standard errors, z or t statistics, p-values and 95%
    /// intervals (one extra pass; dense models up to --inference-max-features).
    #[arg(long)]
    pub inference: bool,
    /// Most features the coefficient table of --inference is computed for (default 2000).
    #[arg(long, value_name = "N")]
    pub inference_max_features: Option<usize>,
    /// Hold this share of the rows out of the training (0 < FRACTION < 1) and report their
    /// loss at every iteration, scored in the same passes; rows are chosen by a hash of
    /// file and row position, or of --split-key.
    #[arg(long, value_name = "FRACTION", allow_negative_numbers = true)]
    pub holdout: Option<f64>,
    /// With --holdout: choose held-out rows by the value of this string or integer
    /// column, so that all rows of one key land on the same side.
    #[arg(long, value_name = "COL")]
    pub split_key: Option<String>,
    /// With --holdout: stop (stop reason holdout-stalled) when the holdout loss has not
    /// improved for K accepted iterations.
    #[arg(long, value_name = "K")]
    pub holdout_patience: Option<u64>,
    /// Hashed categorical columns (strings, integers, booleans, list<utf8> token bags,
    /// or binned numerics COL/WIDTH): each value hashed with its column name into
    /// 2^--hash-bits buckets with a sign; nulls get a bucket of their own.
    #[arg(long, value_delimiter = ',', value_name = "COL,...")]
    pub categorical: Option<Vec<String>>,
    /// A cross of categorical columns (or binned numerics COL/WIDTH), hashed like
    /// --categorical: `zone*hour`; repeat the flag for several crosses.
    #[arg(long, value_name = "A*B[*C]")]
    pub cross: Vec<String>,
    /// Bits of the hash: 2^BITS buckets, from 10 to 28 (default 20).
    #[arg(long, value_name = "BITS")]
    pub hash_bits: Option<u32>,
    /// A pre-encoded sparse vector column list<struct<index, value>> with indices in
    /// 0..DIM; repeat the flag for several columns.
    #[arg(long, value_name = "COL:DIM")]
    pub sparse_vector: Vec<String>,
    /// Most memory in MB for the per-shard gradient buffers of a sparse model
    /// (shards × coefficients × 8 bytes; default 2048).
    #[arg(long, value_name = "MB", allow_negative_numbers = true)]
    pub gradient_memory: Option<f64>,
    /// Run directory for the log and settings (default: next to --out, `MODEL.run`).
    #[arg(long, value_name = "DIR")]
    pub run: Option<PathBuf>,
    /// Where to write the model file.
    #[arg(long, value_name = "MODEL.json")]
    pub out: Option<PathBuf>,
    /// Inside a long pass, checkpoint the partial sums this often: `90s`, `5m`, `1h`,
    /// `250ms` or seconds (default 5m).
    #[arg(long, value_name = "DURATION")]
    pub checkpoint_every: Option<String>,
    /// Directory of the block cache (default: the run directory); fits on the same data
    /// and feature settings share it.
    #[arg(long, value_name = "DIR")]
    pub cache: Option<PathBuf>,
    /// Read Parquet on every pass instead of writing and reading a block cache (for a
    /// disk that cannot hold a second copy of the data).
    #[arg(long)]
    pub no_cache: bool,
    /// Precision of feature values: `stored` (default: as in the file, float64 stays
    /// f64) or `f32` (float64 values rounded to f32: half the memory traffic, fewer
    /// digits; sums stay f64).
    #[arg(long, value_name = "P")]
    pub precision: Option<String>,
    /// Print one JSON summary object on stdout at the end (progress stays on stderr).
    #[arg(long)]
    pub json: bool,
    /// Print no progress lines.
    #[arg(long)]
    pub quiet: bool,
}

/// Flags of `outcore resume`. Only what does not change the objective can be changed.
#[derive(Debug, Args)]
pub struct ResumeArgs {
    /// The run directory of the fit (holds `settings.json` and `checkpoint`).
    #[arg(value_name = "DIR")]
    pub dir: PathBuf,
    /// New total pass budget (the passes already done count).
    #[arg(long, value_name = "N")]
    pub max_passes: Option<u64>,
    /// New wall-clock budget in seconds for the whole fit.
    #[arg(long, value_name = "S", allow_negative_numbers = true)]
    pub max_seconds: Option<f64>,
    /// Threads for the passes (the shard count stays as recorded).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Inside a long pass, checkpoint the partial sums this often (default 5m).
    #[arg(long, value_name = "DURATION")]
    pub checkpoint_every: Option<String>,
    /// Print one JSON summary object on stdout at the end.
    #[arg(long)]
    pub json: bool,
    /// Print no progress lines.
    #[arg(long)]
    pub quiet: bool,
}

/// Flags of `outcore predict`.
#[derive(Debug, Args)]
pub struct PredictArgs {
    /// The model file.
    #[arg(long, value_name = "MODEL.json")]
    pub model: PathBuf,
    /// Parquet files, directories of them, or glob patterns.
    #[arg(long, required = true, num_args = 1.., value_name = "PATH")]
    pub data: Vec<String>,
    /// Where to write the scores (Parquet).
    #[arg(long, value_name = "SCORES.parquet")]
    pub out: PathBuf,
    /// Columns of the input copied into the output beside the scores.
    #[arg(long, value_delimiter = ',', value_name = "COL,...")]
    pub keep: Vec<String>,
}

/// Flags of `outcore evaluate`.
#[derive(Debug, Args)]
pub struct EvaluateArgs {
    /// The model file.
    #[arg(long, value_name = "MODEL.json")]
    pub model: PathBuf,
    /// Parquet files, directories of them, or glob patterns; they must hold the target.
    #[arg(long, required = true, num_args = 1.., value_name = "PATH")]
    pub data: Vec<String>,
    /// Print one JSON object with every measure on stdout instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Memory for the exact AUC in MB (16 bytes per row; default 512); past it the AUC
    /// comes from a histogram of the scores with a stated error bound.
    #[arg(long, value_name = "MB", allow_negative_numbers = true)]
    pub auc_memory: Option<f64>,
    /// Skip (and count) rows whose target is null instead of refusing them.
    #[arg(long)]
    pub skip_missing_target: bool,
}

/// Flags of `outcore inference`.
#[derive(Debug, Args)]
pub struct InferenceArgs {
    /// The model file.
    #[arg(value_name = "MODEL.json")]
    pub model: PathBuf,
    /// The training data of the model, unchanged (their fingerprint is checked).
    #[arg(long, required = true, num_args = 1.., value_name = "PATH")]
    pub data: Vec<String>,
    /// Where to write the model with its table (default: over MODEL.json, atomically).
    #[arg(long, value_name = "MODEL.json")]
    pub out: Option<PathBuf>,
    /// Threads for the pass (default: all cores).
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Most dense features for which the table is computed.
    #[arg(long, default_value_t = outcore::inference::DEFAULT_MAX_FEATURES, value_name = "N")]
    pub inference_max_features: usize,
}

/// Flags of `outcore inspect`.
#[derive(Debug, Args)]
pub struct InspectArgs {
    /// The model file.
    #[arg(value_name = "MODEL.json")]
    pub model: PathBuf,
    /// How many coefficients to list, largest standardized magnitude first.
    #[arg(long, default_value_t = 20, value_name = "N")]
    pub top: usize,
}

/// Flags of `outcore demo`.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Directory to write the demo files into (created if missing).
    #[arg(long, value_name = "DIR")]
    pub out: PathBuf,
    /// Rows (orders) to write.
    #[arg(long, default_value_t = 100_000, value_name = "N")]
    pub rows: u64,
    /// Seed of the random stream.
    #[arg(long, default_value_t = 7, value_name = "S")]
    pub seed: u64,
    /// Most rows in one file.
    #[arg(long, default_value_t = 1_000_000, value_name = "N")]
    pub rows_per_file: u64,
}

/// Flags of `outcore path`: the fit flags (but the penalty, --out and --run) and the grid.
#[derive(Debug, Args)]
pub struct PathArgs {
    /// Data, target, features, holdout and optimizer settings, as for `outcore fit`.
    #[command(flatten)]
    pub fit: FitArgs,
    /// The penalty the grid scales: ridge, lasso (default) or elastic (with --mix).
    #[arg(long, value_name = "KIND")]
    pub penalty: Option<String>,
    /// With --penalty elastic: the lasso share A of each strength λ (lasso = A·λ,
    /// ridge = (1 − A)·λ).
    #[arg(long, value_name = "A", allow_negative_numbers = true)]
    pub mix: Option<f64>,
    /// Strengths: START:END:COUNT on a log scale (fitted strongest first), or auto:COUNT
    /// from the smallest lasso strength where every coefficient is zero (default auto:20
    /// for lasso and elastic; ridge needs START:END:COUNT).
    #[arg(long, value_name = "SPEC")]
    pub grid: Option<String>,
    /// With --grid auto:COUNT: the last strength over the first (default 1e-3).
    #[arg(long, value_name = "RATIO", allow_negative_numbers = true)]
    pub span: Option<f64>,
    /// Choose the strongest strength whose holdout loss is within one standard error of
    /// the lowest, instead of the lowest.
    #[arg(long)]
    pub one_se: bool,
    /// Start every strength from the intercept-only model instead of the previous
    /// solution (for comparisons; costs more passes).
    #[arg(long)]
    pub cold: bool,
    /// Directory for the table (path.json, path.csv), every model and the chosen one.
    #[arg(long, value_name = "DIR")]
    pub out_dir: PathBuf,
}

/// Flags of `outcore report`.
#[derive(Debug, Args)]
pub struct ReportArgs {
    /// A fit's run directory (holds settings.json and log.jsonl) or a path's --out-dir
    /// (holds path.json).
    #[arg(value_name = "RUN_DIR")]
    pub dir: PathBuf,
    /// Where to write the HTML file.
    #[arg(long, value_name = "REPORT.html")]
    pub out: PathBuf,
    /// How many coefficients the bar chart shows, largest first (default 20).
    #[arg(long, default_value_t = 20, value_name = "N")]
    pub top: usize,
}
