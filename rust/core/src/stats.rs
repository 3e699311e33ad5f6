//! PairStats: exact u64 counts of the rows, each column's levels and each pair's contingency table.
//! Two PairStats over the same codes merge by element-wise addition, so any split of the data
//! (batches, files, threads, workers) gives the same numbers, bit for bit.

use rayon::prelude::*;

use crate::error::{Error, Result};
use crate::kernels::{self, Kernel};

mod remap;

/// The largest number of table cells we agree to hold (2^33 cells = 64 GiB of u64): a hard cap
/// below the memory limit in force, which `memory::check_fit` checks first.
pub const MAX_CELLS: u64 = 1 << 33;

/// Exact co-occurrence counts over a fixed set of coded columns.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct PairStats {
    n_rows: u64,
    cards: Vec<usize>,
    marginals: Vec<Vec<u64>>,
    /// `offsets[p]..offsets[p+1]` is pair p's table in `cells`, row-major `r_i x r_j` for i < j.
    offsets: Vec<usize>,
    cells: Vec<u64>,
}

/// The index of pair (i, j), i < j, in the order (0,1), (0,2), ..., (1,2), ...
pub fn pair_index(d: usize, i: usize, j: usize) -> usize {
    i * d - i * (i + 1) / 2 + (j - i - 1)
}

/// The number of pairs of `d` columns.
pub fn pair_count(d: usize) -> usize {
    d * d.saturating_sub(1) / 2
}

/// Every pair (i, j) with i < j, in pair-index order.
pub fn pairs(d: usize) -> Vec<(usize, usize)> {
    (0..d)
        .flat_map(|i| (i + 1..d).map(move |j| (i, j)))
        .collect()
}

/// The number of table cells that PairStats over these cardinalities holds.
pub fn cell_count(cards: &[usize]) -> u64 {
    let mut total: u64 = 0;
    let mut suffix: u64 = cards.iter().map(|&r| r as u64).sum();
    for &r in cards {
        suffix -= r as u64;
        total = total.saturating_add((r as u64).saturating_mul(suffix));
    }
    total
}

impl PairStats {
    /// Zero counts for columns with these numbers of codes.
    pub fn new(cards: Vec<usize>) -> Result<Self> {
        let cells = cell_count(&cards);
        if cells > MAX_CELLS {
            return Err(Error::ResourceLimit(format!(
                "the pair tables would hold {cells} cells ({} GiB); lower max_categories or fit fewer columns",
                (cells * 8) >> 30
            )));
        }
        let d = cards.len();
        let mut offsets = Vec::with_capacity(pair_count(d) + 1);
        offsets.push(0);
        for (i, j) in pairs(d) {
            let last = offsets.last().copied().unwrap_or(0);
            offsets.push(last + cards[i] * cards[j]);
        }
        let total = offsets.last().copied().unwrap_or(0);
        let marginals = cards.iter().map(|&r| vec![0; r]).collect();
        // A failed allocation must be an error, not an abort of the whole process.
        let mut cells = Vec::new();
        cells.try_reserve_exact(total).map_err(|_| {
            Error::ResourceLimit(format!(
                "the pair tables need {total} cells ({} GiB), more memory than can be allocated \
                 here; lower max_categories, fit fewer columns, or model the widest columns as \
                 numeric (kinds={{'column': 'numeric'}}) or leave them out",
                (total * 8) >> 30
            ))
        })?;
        cells.resize(total, 0);
        Ok(PairStats {
            n_rows: 0,
            cards,
            marginals,
            offsets,
            cells,
        })
    }

    /// Rebuilds PairStats from its parts, checking every length and that the counts agree.
    pub fn from_parts(
        n_rows: u64,
        cards: Vec<usize>,
        marginals: Vec<Vec<u64>>,
        cells: Vec<u64>,
    ) -> Result<Self> {
        let bad = |what: String| Err(Error::CorruptModel(format!("pair statistics: {what}")));
        // The cell count follows from the cardinalities: check it before allocating anything,
        // so that a file cannot ask for more memory than its own size.
        if cell_count(&cards) != cells.len() as u64 {
            return bad(format!(
                "{} table cells where the cardinalities call for {}",
                cells.len(),
                cell_count(&cards)
            ));
        }
        if let Some(c) = cells.iter().find(|c| **c > n_rows) {
            return bad(format!("a table cell counts {c} rows of {n_rows}"));
        }
        let mut stats = PairStats::new(cards)?;
        if marginals.len() != stats.cards.len() {
            return bad(format!(
                "{} marginals for {} columns",
                marginals.len(),
                stats.cards.len()
            ));
        }
        for (i, (m, r)) in marginals.iter().zip(&stats.cards).enumerate() {
            if m.len() != *r {
                return bad(format!(
                    "column {i} has {} marginal counts but {r} codes",
                    m.len()
                ));
            }
            if m.iter().try_fold(0u64, |acc, c| acc.checked_add(*c)) != Some(n_rows) {
                return bad(format!(
                    "column {i}'s marginal counts do not add up to {n_rows} rows"
                ));
            }
        }
        if cells.len() != stats.cells.len() {
            return bad(format!(
                "{} table cells where {} are expected",
                cells.len(),
                stats.cells.len()
            ));
        }
        stats.n_rows = n_rows;
        stats.marginals = marginals;
        stats.cells = cells;
        let d = stats.cards.len();
        for (i, j) in pairs(d) {
            let t = stats.table(i, j);
            let rj = stats.cards[j];
            for a in 0..stats.cards[i] {
                let row = t[a * rj..(a + 1) * rj]
                    .iter()
                    .try_fold(0u64, |x, c| x.checked_add(*c));
                if row != Some(stats.marginals[i][a]) {
                    return bad(format!(
                        "the table of columns {i} and {j} disagrees with column {i}'s counts"
                    ));
                }
            }
            for b in 0..rj {
                let col = (0..stats.cards[i]).try_fold(0u64, |x, a| x.checked_add(t[a * rj + b]));
                if col != Some(stats.marginals[j][b]) {
                    return bad(format!(
                        "the table of columns {i} and {j} disagrees with column {j}'s counts"
                    ));
                }
            }
        }
        Ok(stats)
    }

    /// The number of columns.
    pub fn n_columns(&self) -> usize {
        self.cards.len()
    }
    /// The number of rows counted.
    pub fn n_rows(&self) -> u64 {
        self.n_rows
    }
    /// Each column's number of codes.
    pub fn cardinalities(&self) -> &[usize] {
        &self.cards
    }
    /// Column i's count per code.
    pub fn marginal(&self, i: usize) -> &[u64] {
        &self.marginals[i]
    }
    /// All marginals.
    pub fn marginals(&self) -> &[Vec<u64>] {
        &self.marginals
    }
    /// Every table cell, pair after pair.
    pub fn cells(&self) -> &[u64] {
        &self.cells
    }
    /// The contingency table of columns i < j, row-major `r_i x r_j`.
    pub fn table(&self, i: usize, j: usize) -> &[u64] {
        let p = pair_index(self.cards.len(), i, j);
        &self.cells[self.offsets[p]..self.offsets[p + 1]]
    }

    /// Counts one batch of coded columns (each a slice of codes, all of one length). The counting
    /// kernel is chosen per pair (see `kernels`), or forced by `TREEWISE_KERNEL`; every kernel
    /// gives the same counts.
    pub fn add_codes(&mut self, codes: &[Vec<u16>]) -> Result<()> {
        let d = self.cards.len();
        if codes.len() != d {
            return Err(Error::Invalid(format!(
                "{} code columns for {d} columns",
                codes.len()
            )));
        }
        let n = codes.first().map_or(0, Vec::len);
        for (i, col) in codes.iter().enumerate() {
            if col.len() != n {
                return Err(Error::Invalid(format!(
                    "code column {i} has {} rows, not {n}",
                    col.len()
                )));
            }
        }
        // Read before anything changes, so that a bad setting leaves the counts as they were. The
        // kernels check every code (below its column's cardinality) before they count.
        let kernel = Kernel::from_env()?;
        let columns: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
        let mut tables: Vec<&mut [u64]> = Vec::with_capacity(self.offsets.len().saturating_sub(1));
        let mut rest: &mut [u64] = &mut self.cells;
        for w in self.offsets.windows(2) {
            let (head, tail) = std::mem::take(&mut rest).split_at_mut(w[1] - w[0]);
            tables.push(head);
            rest = tail;
        }
        kernels::count(
            &columns,
            &self.cards,
            &mut self.marginals,
            &mut tables,
            kernel,
        )?;
        self.n_rows += n as u64;
        Ok(())
    }

    /// Adds `other`'s counts to these; both must count columns with the same cardinalities.
    pub fn merge(&mut self, other: &PairStats) -> Result<()> {
        if self.cards != other.cards {
            return Err(Error::Schema(format!(
                "cannot add pair statistics over different codes: cardinalities {:?} and {:?}; \
                 count both with the same codebook",
                self.cards, other.cards
            )));
        }
        self.n_rows += other.n_rows;
        for (a, b) in self.marginals.iter_mut().zip(&other.marginals) {
            a.iter_mut().zip(b).for_each(|(x, y)| *x += y);
        }
        self.cells
            .par_iter_mut()
            .zip(other.cells.par_iter())
            .for_each(|(x, y)| *x += y);
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pair_index_walks_pairs_in_order() {
        let d = 5;
        for (p, (i, j)) in pairs(d).into_iter().enumerate() {
            assert_eq!(pair_index(d, i, j), p);
        }
    }

    #[test]
    fn counts_merge_exactly() -> Result<()> {
        let codes = vec![vec![0u16, 1, 1, 2], vec![1u16, 0, 1, 1]];
        let mut whole = PairStats::new(vec![3, 2])?;
        whole.add_codes(&codes)?;
        assert_eq!(whole.table(0, 1), &[0, 1, 1, 1, 0, 1]);
        let mut a = PairStats::new(vec![3, 2])?;
        a.add_codes(&[codes[0][..1].to_vec(), codes[1][..1].to_vec()])?;
        let mut b = PairStats::new(vec![3, 2])?;
        b.add_codes(&[codes[0][1..].to_vec(), codes[1][1..].to_vec()])?;
        a.merge(&b)?;
        assert_eq!(a, whole);
        let rebuilt = PairStats::from_parts(
            whole.n_rows(),
            whole.cardinalities().to_vec(),
            whole.marginals().to_vec(),
            whole.cells().to_vec(),
        )?;
        assert_eq!(rebuilt, whole);
        Ok(())
    }

    #[test]
    fn out_of_range_codes_are_an_error() -> Result<()> {
        let mut s = PairStats::new(vec![2, 2])?;
        assert!(s.add_codes(&[vec![0, 2], vec![0, 1]]).is_err());
        Ok(())
    }
}
