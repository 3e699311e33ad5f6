//! treewise-core: codebooks, exact pair counts, mutual information and Kruskal, with no Python.

pub mod bytes;
pub mod codebook;
pub mod dtype;
pub mod error;
pub mod infer;
pub mod io;
pub mod kernels;
pub mod model;
pub mod rng;
pub mod shape;
pub mod stats;
pub mod tally;
pub mod tree;
pub mod values;
pub mod weights;

pub use codebook::{Codebook, ColumnCode, Values};
pub use error::{Error, Result};
pub use stats::PairStats;
pub use tally::{CapReport, CodebookBuilder, KindChoice, Learned, Note};
pub use weights::PairWeight;

/// Which edges of the maximum spanning tree to keep; dropping some turns the tree into a forest.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Prune {
    /// Keep the whole spanning tree.
    None,
    /// Keep an edge only while its G statistic exceeds dof·ln N (the BIC of adding it is lower).
    Bic,
    /// Keep an edge only while the G-test rejects independence at this significance level.
    Level(f64),
}

impl Prune {
    /// Whether an edge with this weight stays, over `n` rows.
    pub fn keeps(self, w: &PairWeight, n: u64) -> bool {
        match self {
            Prune::None => true,
            Prune::Bic => w.g_statistic > w.dof as f64 * (n as f64).ln(),
            Prune::Level(level) => w.p_value < level,
        }
    }
}

/// A fitted structure: every pair's weight, the chosen edges and their orientation.
#[derive(Clone, Debug)]
pub struct Structure {
    /// Weights of every pair, in pair-index order.
    pub weights: Vec<PairWeight>,
    /// The oriented forest.
    pub oriented: tree::Oriented,
}

/// Chow–Liu: the maximum mutual-information spanning tree of `stats` (pruned to a forest by
/// `prune`), oriented from `root`.
pub fn chow_liu(stats: &PairStats, root: usize, prune: Prune) -> Result<Structure> {
    let d = stats.n_columns();
    if root >= d {
        return Err(Error::Invalid(format!(
            "root {root} is not one of the {d} columns"
        )));
    }
    if let Prune::Level(level) = prune {
        if !(level > 0.0 && level < 1.0) {
            return Err(Error::Invalid(format!(
                "a pruning significance level must be between 0 and 1, got {level}"
            )));
        }
    }
    let weights = weights::all_weights(stats);
    let mi: Vec<f64> = weights.iter().map(|w| w.mutual_info).collect();
    let n = stats.n_rows();
    let edges = tree::kruskal(d, &mi, |p| prune.keeps(&weights[p], n));
    Ok(Structure {
        weights,
        oriented: tree::orient(d, &edges, root),
    })
}

/// Fits the Chow–Liu structure to `stats` and returns it as a model with smoothing `alpha`.
/// Without a `root`, the root is the centre of the tree among columns that are not constant
/// (see [`tree::centre`]).
pub fn fit_model(
    codebook: Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    root: Option<usize>,
    alpha: f64,
    prune: Prune,
) -> Result<model::TreeModel> {
    let s = chow_liu(stats, root.unwrap_or(0), prune)?;
    let mi = s.weights.iter().map(|w| w.mutual_info).collect();
    let d = stats.n_columns();
    let (root, parent) = match root {
        Some(r) => (r, s.oriented.parent),
        None => {
            let edges: Vec<(usize, usize)> = s
                .oriented
                .parent
                .iter()
                .enumerate()
                .filter_map(|(c, p)| p.map(|p| (p, c)))
                .collect();
            let eligible: Vec<bool> = codebook.cardinalities().iter().map(|r| *r > 1).collect();
            let r = tree::centre(d, &edges, &eligible);
            (r, tree::orient(d, &edges, r).parent)
        }
    };
    model::TreeModel::from_stats(codebook, dtypes, stats, root, parent, mi, alpha)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pruning_keeps_only_edges_that_pay() -> Result<()> {
        // Columns 0 and 1 are copies; column 2 is independent of both (exact outer product).
        let a: Vec<u16> = (0..400).map(|k| (k % 2) as u16).collect();
        let c: Vec<u16> = (0..400).map(|k| ((k / 2) % 2) as u16).collect();
        let mut stats = PairStats::new(vec![2, 2, 2])?;
        stats.add_codes(&[a.clone(), a, c])?;
        let full = chow_liu(&stats, 0, Prune::None)?;
        assert_eq!(
            full.oriented.parent.iter().filter(|p| p.is_some()).count(),
            2
        );
        for prune in [Prune::Bic, Prune::Level(0.01)] {
            let s = chow_liu(&stats, 0, prune)?;
            assert_eq!(s.oriented.parent, vec![None, Some(0), None], "{prune:?}");
        }
        assert!(chow_liu(&stats, 0, Prune::Level(1.5)).is_err());
        Ok(())
    }
}
