//! outcore fits regularized generalized linear models (logistic, linear, Poisson and
//! multinomial logistic regression) on Parquet data larger than memory, on one machine.
//!
//! The data are streamed from Parquet files in fixed blocks; every evaluation of the
//! objective is one full pass over the data, summed over a fixed set of shards so that
//! the result does not depend on the thread count. An L-BFGS driver (OWL-QN when an L1
//! penalty is set) minimizes the objective.
//!
//! The optimizer is usable on its own: implement [`optim::Objective`] and call
//! [`optim::minimize`].
//!
//! ```
//! use outcore::optim::{minimize, Objective, Settings};
//!
//! // Least squares: minimize ½‖Ax − b‖² for a small A.
//! struct LeastSquares { a: Vec<[f64; 2]>, b: Vec<f64> }
//!
//! impl Objective for LeastSquares {
//!     fn dim(&self) -> usize { 2 }
//!     fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> outcore::Result<f64> {
//!         grad.fill(0.0);
//!         let mut f = 0.0;
//!         for (row, bi) in self.a.iter().zip(&self.b) {
//!             let r = row[0] * x[0] + row[1] * x[1] - bi;
//!             f += 0.5 * r * r;
//!             grad[0] += r * row[0];
//!             grad[1] += r * row[1];
//!         }
//!         Ok(f)
//!     }
//! }
//!
//! let mut problem = LeastSquares {
//!     a: vec![[1.0, 0.0], [0.0, 2.0], [1.0, 1.0]],
//!     b: vec![1.0, 2.0, 2.0],
//! };
//! let result = minimize(&mut problem, &[0.0, 0.0], &Settings::default()).unwrap();
//! assert!(result.stop.is_converged());
//! // The normal equations give x = (1, 1).
//! assert!((result.x[0] - 1.0).abs() < 1e-5 && (result.x[1] - 1.0).abs() < 1e-5);
//! ```

#![warn(missing_docs)]
// Kernels index several parallel slices by row; an index loop says that most plainly.
#![allow(clippy::needless_range_loop)]

pub mod atomic;
pub mod cache;
pub mod checkpoint;
pub mod demo;
pub mod error;
pub mod evaluate;
pub mod features;
pub mod fit;
#[doc(hidden)]
pub mod fuzzing;
pub mod holdout;
pub mod inference;
pub mod memory;
pub mod metrics;
pub mod model;
pub mod objective;
pub mod optim;
pub mod pass;
pub mod path;
pub mod predict;
pub mod report;
pub mod run_dir;
pub mod settings_file;
pub mod simd;
pub mod source;
pub mod weights_file;

pub use error::{Error, ErrorKind, Result};
