//! treewise-core: codebooks, exact pair counts, mutual information and Kruskal, with no Python.

pub mod bytes;
pub mod cancel;
pub mod codebook;
pub mod dtype;
pub mod error;
pub mod fit;
pub mod infer;
pub mod io;
pub mod kernels;
pub mod memory;
pub mod mixture;
pub mod model;
pub mod rng;
pub mod shape;
pub mod stats;
pub mod tally;
pub mod times;
pub mod tree;
pub mod values;
pub mod weights;

pub use codebook::{Codebook, ColumnCode, Values};
pub use error::{Error, Result};
pub use fit::{chow_liu, fit_model, Prune, Structure};
pub use stats::PairStats;
pub use tally::{CapReport, CodebookBuilder, KindChoice, Learned, Note};
pub use weights::PairWeight;
