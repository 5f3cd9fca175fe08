//! The objective of DESIGN §4: mean weighted loss over the data plus the ridge term,
//! evaluated by one pass over the data per call. The L1 term is left to the optimizer
//! (OWL-QN), which receives it as per-coordinate weights.

pub mod elementary;
pub mod glm;
pub mod loss;
pub mod sparse_kernel;
pub mod start;

pub use glm::{GlmObjective, Layout};
pub use loss::Loss;
