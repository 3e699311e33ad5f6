//! The counting planner: per pair of one chunk of rows, the kernel with the lowest estimated cost.

use super::{Kernel, Popcount};
use crate::stats::pair_count;

/// Estimated nanoseconds per unit of work on one thread (measured on an x86-64 server core;
/// only their ratios matter).
const COST_HISTOGRAM_ROW: f64 = 0.75;
const COST_LOOKUP_ROW: f64 = 1.5;
const COST_COOC_PAIR: f64 = 4.0;
const COST_COOC_ENTRY: f64 = 3.0;
const COST_COOC_SCAN: f64 = 0.06;

/// How one pair is counted.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Method {
    Naive,
    Histogram,
    Bitset,
    /// Walk the first column's non-dominant rows; derive its dominant row.
    LookupFirst,
    /// Walk the second column's non-dominant rows; derive its dominant column.
    LookupSecond,
    /// Sparse co-occurrence: both columns are in the sparse set.
    Cooc,
}

/// The counting plan of one chunk of rows.
#[derive(Clone, Debug)]
pub(crate) struct Plan {
    /// Per pair, in pair-index order.
    pub(crate) methods: Vec<Method>,
    /// Per column, the level the sparse methods leave out and derive (the most frequent one).
    pub(crate) dominant: Vec<u16>,
}

/// Chooses a method for every pair of one chunk of `n` rows.
pub(crate) fn plan(
    kernel: Kernel,
    n: usize,
    cards: &[usize],
    m: &[Vec<u64>],
    path: Popcount,
) -> Plan {
    let d = cards.len();
    let npairs = pair_count(d);
    // The most frequent level (the lowest on ties) and how many rows are not at it.
    let mut dominant = Vec::with_capacity(d);
    let mut nnz = Vec::with_capacity(d);
    for col in m {
        let (level, top) =
            col.iter().enumerate().fold(
                (0usize, 0u64),
                |best, (l, &c)| if c > best.1 { (l, c) } else { best },
            );
        dominant.push(level as u16);
        nnz.push(n as u64 - top);
    }
    let forced = |method| Plan {
        methods: vec![method; npairs],
        dominant: dominant.clone(),
    };
    match kernel {
        Kernel::Naive => return forced(Method::Naive),
        Kernel::Histogram => return forced(Method::Histogram),
        Kernel::Bitset => return forced(Method::Bitset),
        Kernel::Sparse => return forced(Method::Cooc),
        Kernel::Auto => {}
    }
    let nf = n as f64;
    let words = n.div_ceil(64) as f64;
    let bit_word = path.cost_per_cell_word();
    let inner = |i: usize| cards[i].saturating_sub(1) as f64;
    // The cheapest method that looks at one pair alone, with its estimated cost.
    let alone = |i: usize, j: usize| -> (Method, f64) {
        let mut best = (Method::Bitset, inner(i) * inner(j) * words * bit_word);
        for cand in [
            (Method::Histogram, nf * COST_HISTOGRAM_ROW),
            (Method::LookupFirst, nnz[i] as f64 * COST_LOOKUP_ROW),
            (Method::LookupSecond, nnz[j] as f64 * COST_LOOKUP_ROW),
        ] {
            if cand.1 < best.1 {
                best = cand;
            }
        }
        best
    };
    // The sparse set: columns whose pairs with a like column are cheaper to count by
    // co-occurrence than by any dense kernel.
    let sparse: Vec<bool> = (0..d)
        .map(|i| {
            let p = if n == 0 { 0.0 } else { nnz[i] as f64 / nf };
            let k = inner(i);
            let dense = (k * k * bit_word / 64.0).min(COST_HISTOGRAM_ROW);
            p * p * COST_COOC_PAIR <= dense
        })
        .collect();
    let members: Vec<usize> = (0..d).filter(|&i| sparse[i]).collect();
    // Keep the sparse set only if co-occurrence beats the per-pair choice over its pairs.
    let mut use_cooc = members.len() >= 2;
    if use_cooc {
        let mut cooc = 0.0;
        let mut other = 0.0;
        for (x, &i) in members.iter().enumerate() {
            cooc += nf * COST_COOC_SCAN + nnz[i] as f64 * COST_COOC_ENTRY;
            for &j in &members[x + 1..] {
                cooc += if n == 0 {
                    0.0
                } else {
                    (nnz[i] as f64) * (nnz[j] as f64) / nf * COST_COOC_PAIR
                };
                other += alone(i, j).1;
            }
        }
        use_cooc = cooc < other;
    }
    let mut methods = Vec::with_capacity(npairs);
    for i in 0..d {
        for j in i + 1..d {
            methods.push(if use_cooc && sparse[i] && sparse[j] {
                Method::Cooc
            } else {
                alone(i, j).0
            });
        }
    }
    Plan { methods, dominant }
}
