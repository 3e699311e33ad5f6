//! treewise-core: codebooks, exact pair counts, mutual information and Kruskal, with no Python.

pub mod codebook;
pub mod dtype;
pub mod error;
pub mod io;
pub mod model;
pub mod rng;
pub mod stats;
pub mod tree;
pub mod values;
pub mod weights;

pub use codebook::{CapReport, Codebook, CodebookBuilder, ColumnCode, Values};
pub use error::{Error, Result};
pub use stats::PairStats;
pub use weights::PairWeight;

/// A fitted structure: every pair's weight, the chosen edges and their orientation.
#[derive(Clone, Debug)]
pub struct Structure {
    /// Weights of every pair, in pair-index order.
    pub weights: Vec<PairWeight>,
    /// The oriented forest.
    pub oriented: tree::Oriented,
}

/// Chow–Liu: the maximum mutual-information spanning tree of `stats`, oriented from `root`.
pub fn chow_liu(stats: &PairStats, root: usize) -> Result<Structure> {
    let d = stats.n_columns();
    if root >= d {
        return Err(Error::Invalid(format!(
            "root {root} is not one of the {d} columns"
        )));
    }
    let weights = weights::all_weights(stats);
    let mi: Vec<f64> = weights.iter().map(|w| w.mutual_info).collect();
    let edges = tree::kruskal(d, &mi, |_| true);
    Ok(Structure {
        weights,
        oriented: tree::orient(d, &edges, root),
    })
}

/// Fits the Chow–Liu structure to `stats` and returns it as a model with smoothing `alpha`.
pub fn fit_model(
    codebook: Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    root: usize,
    alpha: f64,
) -> Result<model::TreeModel> {
    let s = chow_liu(stats, root)?;
    let mi = s.weights.iter().map(|w| w.mutual_info).collect();
    model::TreeModel::from_stats(codebook, dtypes, stats, root, s.oriented.parent, mi, alpha)
}
