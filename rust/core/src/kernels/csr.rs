//! Sparse input: the exact pair statistics of a CSR matrix counted from its non-zero entries
//! alone, without a dense code matrix. Each column's zero is its dominant level: the cells of a
//! pair that involve a zero follow from the marginals (see `complete`).

use std::ops::Range;

use rayon::prelude::*;

use super::complete;
use crate::error::{Error, Result};
use crate::stats::{pair_index, pairs, PairStats};

/// The non-zero entries of a CSR matrix as codes: row `r` holds the entries
/// `indptr[r]..indptr[r + 1]`, each a column (`indices`, strictly increasing within a row) and
/// that column's code of its value (`codes`). `zero[c]` is column c's code of 0, None when the
/// column has no zeros.
pub struct CsrCodes<'a> {
    pub n_rows: usize,
    pub cards: &'a [usize],
    pub zero: &'a [Option<u16>],
    pub indptr: &'a [u64],
    pub indices: &'a [u32],
    pub codes: &'a [u16],
}

fn bad(what: String) -> Error {
    Error::Data(format!("sparse input: {what}"))
}

impl CsrCodes<'_> {
    /// Checks every offset, column and code before anything is counted.
    fn check(&self) -> Result<()> {
        let d = self.cards.len();
        if self.zero.len() != d {
            return Err(bad(format!(
                "{} zero codes for {d} columns",
                self.zero.len()
            )));
        }
        if self.indptr.len() != self.n_rows + 1 || self.indptr.first() != Some(&0) {
            return Err(bad("the row offsets do not match the rows".into()));
        }
        let nnz = self.indices.len();
        if self.codes.len() != nnz || self.indptr.last().copied() != Some(nnz as u64) {
            return Err(bad("the entries do not match the row offsets".into()));
        }
        for (r, w) in self.indptr.windows(2).enumerate() {
            let Some(row) = self.row(w) else {
                return Err(bad(format!("row {r} has decreasing offsets")));
            };
            if self.indices[row.clone()].windows(2).any(|p| p[0] >= p[1]) {
                return Err(bad(format!(
                    "row {r} has columns out of order or repeated; sort and sum duplicates first"
                )));
            }
            for e in row {
                let c = self.indices[e] as usize;
                let code = self.codes[e];
                if c >= d || usize::from(code) >= self.cards[c] || Some(code) == self.zero[c] {
                    return Err(bad(format!("row {r} has an entry outside the codebook")));
                }
            }
        }
        Ok(())
    }

    fn row(&self, w: &[u64]) -> Option<Range<usize>> {
        let (a, b) = (usize::try_from(w[0]).ok()?, usize::try_from(w[1]).ok()?);
        (a <= b && b <= self.indices.len()).then_some(a..b)
    }
}

/// The pair statistics of a CSR matrix of codes.
pub fn count_csr(input: &CsrCodes<'_>) -> Result<PairStats> {
    input.check()?;
    let d = input.cards.len();
    let cards = input.cards;
    let mut offsets = Vec::with_capacity(pairs(d).len() + 1);
    offsets.push(0usize);
    for (i, j) in pairs(d) {
        let last = offsets.last().copied().unwrap_or(0);
        offsets.push(last + cards[i] * cards[j]);
    }
    let total = offsets.last().copied().unwrap_or(0);
    // Marginals: the non-zero entries, then each column's zeros as the rest of the rows.
    let mut marginals: Vec<Vec<u64>> = cards.iter().map(|&r| vec![0u64; r]).collect();
    let mut nonzero = vec![0u64; d];
    for (&c, &code) in input.indices.iter().zip(input.codes) {
        marginals[c as usize][usize::from(code)] += 1;
        nonzero[c as usize] += 1;
    }
    for (c, m) in marginals.iter_mut().enumerate() {
        let zeros = input.n_rows as u64 - nonzero[c];
        match input.zero[c] {
            Some(z) => m[usize::from(z)] += zeros,
            None if zeros == 0 => {}
            None => {
                return Err(bad(format!(
                    "column {c} has zeros but no code for 0 in the codebook"
                )))
            }
        }
    }
    // The counted cells of a pair: both sides non-zero, k_i x k_j of them (one for two flag
    // columns), packed so that a thread's u32 counters stay small enough for the caches.
    let k: Vec<usize> = (0..d)
        .map(|c| cards[c] - usize::from(input.zero[c].is_some()))
        .collect();
    let inner = |c: usize, code: u16| -> usize {
        usize::from(code) - usize::from(input.zero[c].is_some_and(|z| code > z))
    };
    let mut inner_off = Vec::with_capacity(offsets.len());
    inner_off.push(0usize);
    for (i, j) in pairs(d) {
        let last = inner_off.last().copied().unwrap_or(0);
        inner_off.push(last + k[i] * k[j]);
    }
    let inner_total = inner_off.last().copied().unwrap_or(0);
    // Pairs of non-zero entries that share a row: one range of rows per thread, counted in u32
    // blocks of at most 2^31 rows (so no counter can overflow) and added up in u64.
    let threads = rayon::current_num_threads().max(1);
    let n = input.n_rows;
    const BLOCK: usize = 1 << 31;
    let partials: Vec<Vec<u64>> = (0..threads)
        .into_par_iter()
        .map(|t| {
            let mut total = vec![0u64; inner_total];
            let mut counts = vec![0u32; inner_total];
            let (lo, hi) = (n * t / threads, n * (t + 1) / threads);
            let mut start = lo;
            while start < hi {
                let end = (start + BLOCK).min(hi);
                for r in start..end {
                    let (a, b) = (input.indptr[r] as usize, input.indptr[r + 1] as usize);
                    let (cols, codes) = (&input.indices[a..b], &input.codes[a..b]);
                    for x in 0..cols.len() {
                        let i = cols[x] as usize;
                        let ci = inner(i, codes[x]);
                        for y in x + 1..cols.len() {
                            let j = cols[y] as usize;
                            let cj = inner(j, codes[y]);
                            counts[inner_off[pair_index(d, i, j)] + ci * k[j] + cj] += 1;
                        }
                    }
                }
                total
                    .iter_mut()
                    .zip(&counts)
                    .for_each(|(x, &y)| *x += u64::from(y));
                counts.iter_mut().for_each(|c| *c = 0);
                start = end;
            }
            total
        })
        .collect();
    let mut counted = vec![0u64; inner_total];
    for part in &partials {
        counted.iter_mut().zip(part).for_each(|(x, y)| *x += y);
    }
    drop(partials);
    // Each pair's full table: its counted cells, then those with a zero on either side from
    // the marginals.
    let mut cells = vec![0u64; total];
    let mut tables: Vec<&mut [u64]> = Vec::with_capacity(offsets.len().saturating_sub(1));
    let mut rest: &mut [u64] = &mut cells;
    for w in offsets.windows(2) {
        let (head, tail) = std::mem::take(&mut rest).split_at_mut(w[1] - w[0]);
        tables.push(head);
        rest = tail;
    }
    let all = pairs(d);
    tables
        .par_iter_mut()
        .zip(all.par_iter().enumerate())
        .try_for_each(|(table, (p, &(i, j)))| {
            let (zi, zj) = (input.zero[i], input.zero[j]);
            let mut at = inner_off[p];
            for a in 0..cards[i] {
                if Some(a as u16) == zi {
                    continue;
                }
                for b in 0..cards[j] {
                    if Some(b as u16) == zj {
                        continue;
                    }
                    table[a * cards[j] + b] = counted[at];
                    at += 1;
                }
            }
            let (zi, zj) = (zi.map(usize::from), zj.map(usize::from));
            complete(table, cards[j], zi, zj, &marginals[i], &marginals[j])
        })?;
    PairStats::from_parts(n as u64, cards.to_vec(), marginals, cells)
}
