//! The fit stage: Chow–Liu (the maximum spanning tree of the pair weights), pruning to a forest,
//! and the assembly of a [`TreeModel`] from a structure and the counts.

use crate::codebook::Codebook;
use crate::error::{Error, Result};
use crate::model::TreeModel;
use crate::stats::{pair_count, PairStats};
use crate::tree;
use crate::weights::{self, PairWeight};

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

fn check_root(root: usize, d: usize) -> Result<()> {
    if root >= d {
        return Err(Error::Invalid(format!(
            "root {root} is not one of the {d} columns"
        )));
    }
    Ok(())
}

/// Chow–Liu: the maximum mutual-information spanning tree of `stats` (pruned to a forest by
/// `prune`), oriented from `root`.
pub fn chow_liu(stats: &PairStats, root: usize, prune: Prune) -> Result<Structure> {
    let d = stats.n_columns();
    check_root(root, d)?;
    if let Prune::Level(level) = prune {
        if !(level > 0.0 && level < 1.0) {
            return Err(Error::Invalid(format!(
                "a pruning significance level must be between 0 and 1, got {level}"
            )));
        }
    }
    let weights = weights::all_weights(stats);
    crate::cancel::current().check()?;
    let mi: Vec<f64> = weights.iter().map(|w| w.mutual_info).collect();
    let n = stats.n_rows();
    let edges = tree::kruskal(d, &mi, |p| prune.keeps(&weights[p], n));
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
    root: Option<usize>,
    alpha: f64,
    prune: Prune,
) -> Result<TreeModel> {
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
    TreeModel::from_stats(codebook, dtypes, stats, root, parent, mi, alpha)
}

/// The model of the maximum spanning tree of `weights` (one per pair, in pair-index order; for
/// example conditional mutual information), oriented from `root`, with tables from `stats`.
/// Ties follow the strict edge order of the Chow-Liu fit.
pub fn model_from_weights(
    codebook: Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    weights: Vec<f64>,
    root: usize,
    alpha: f64,
) -> Result<TreeModel> {
    let d = stats.n_columns();
    if weights.len() != pair_count(d) {
        return Err(Error::Invalid(format!(
            "{d} columns need {} pair weights, got {}",
            pair_count(d),
            weights.len()
        )));
    }
    check_root(root, d)?;
    let edges = tree::kruskal(d, &weights, |_| true);
    let parent = tree::orient(d, &edges, root).parent;
    TreeModel::from_stats(codebook, dtypes, stats, root, parent, weights, alpha)
}

/// The model of a given forest (`parent[c]` is None for a root) with tables from `stats`; the
/// first root orients it.
pub fn model_from_parents(
    codebook: Codebook,
    dtypes: Vec<String>,
    stats: &PairStats,
    parent: Vec<Option<usize>>,
    alpha: f64,
) -> Result<TreeModel> {
    let root = parent
        .iter()
        .position(Option::is_none)
        .ok_or_else(|| Error::Invalid("a forest needs at least one root".into()))?;
    let mi = weights::all_weights(stats)
        .iter()
        .map(|w| w.mutual_info)
        .collect();
    TreeModel::from_stats(codebook, dtypes, stats, root, parent, mi, alpha)
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::codebook::{ColumnCode, Values};

    /// A codebook of integer columns `c0, c1, ...` whose codes are the values 0..r.
    pub(crate) fn int_codebook(cards: &[usize]) -> Result<Codebook> {
        let columns = cards
            .iter()
            .enumerate()
            .map(|(c, &r)| {
                ColumnCode::new(
                    format!("c{c}"),
                    Values::Int((0..r as i64).collect()),
                    false,
                    false,
                )
            })
            .collect::<Result<Vec<_>>>()?;
        Codebook::new(columns)
    }

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

    #[test]
    fn the_model_reports_the_weights_of_the_fit() -> Result<()> {
        use crate::stats::pair_index;
        // Three columns of 3, 2 and 4 codes; column 2 never takes code 3.
        let codes: Vec<Vec<u16>> = vec![
            (0..300).map(|k| (k % 3) as u16).collect(),
            (0..300).map(|k| ((k % 3 + k / 7) % 2) as u16).collect(),
            (0..300).map(|k| ((k % 3 + k / 11) % 3) as u16).collect(),
        ];
        let cards = [3usize, 2, 4];
        let mut stats = PairStats::new(cards.to_vec())?;
        stats.add_codes(&codes)?;
        let codebook = int_codebook(&cards)?;
        let dtypes = vec!["int64".to_string(); 3];
        for root in 0..3 {
            let s = chow_liu(&stats, root, Prune::None)?;
            let model = fit_model(
                codebook.clone(),
                dtypes.clone(),
                &stats,
                Some(root),
                1.0,
                Prune::None,
            )?;
            assert_eq!(model.parent(), s.oriented.parent.as_slice());
            assert_eq!(model.order(), s.oriented.order.as_slice());
            for (c, p) in s.oriented.parent.iter().enumerate() {
                let want = p.map(|p| s.weights[pair_index(3, p.min(c), p.max(c))]);
                assert_eq!(model.edge_weight(c), want, "root {root}, column {c}");
            }
        }
        Ok(())
    }
}
