//! Counting kernels behind `PairStats::add_codes`: bitsets with AND + popcount, row-blocked
//! histograms and sparse co-occurrence, chosen per pair by estimated cost; all exact in u64.
//!
//! Every kernel fills some cells of a pair's table by counting and derives the others from the
//! batch's marginals, so every method gives the same integers:
//!
//! - **bitset** (small cardinality): one bitset per (column, level) over a block of rows, for every
//!   level but the last. Pair cell (a, b) with both levels inner is `popcount(A_a & B_b)` summed
//!   over the words; the last row and column follow from the marginals, the corner from N.
//! - **histogram** (larger cardinality): block-local u32 counters over the combined code
//!   `a * r_j + b`, merged into the u64 table after each block of rows.
//! - **sparse** (columns dominated by one level): each row lists its non-dominant (column, level)
//!   entries and only the pairs that co-occur are counted; the dominant row and column follow
//!   from the marginals (the accelerated method of Meila, JMLR 2000). A pair with only one such
//!   column walks that column's non-dominant rows ("lookup") and derives the dominant row.
//! - **naive**: `table[a * r_j + b] += 1` per row, the plain definition.
//!
//! `TREEWISE_KERNEL` (auto, bitset, histogram, sparse, naive) forces one kernel for every pair;
//! it is read at every call so that tests can set it in-process.

mod bitset;
mod csr;
mod histogram;
mod plan;
mod popcount;
mod sparse;
#[cfg(test)]
mod tests;
mod walk;

use std::ops::Range;

use rayon::prelude::*;

use crate::cancel;
use crate::error::{Error, Result};

use bitset::count_bitset;
pub use csr::{count_csr, CsrCodes};
use histogram::{count_pair_histogram, count_pair_naive};
pub(crate) use plan::{plan, Method, Plan};
pub use popcount::Popcount;
use sparse::count_cooc;
use walk::count_lookup;

/// The environment variable that forces one counting kernel for every pair.
pub const KERNEL_ENV: &str = "TREEWISE_KERNEL";

/// Rows counted at once: bounds the memory of bitsets, row lists and sparse entries, and keeps
/// every block-local u32 counter and u32 row index far from overflow.
const CHUNK_ROWS: usize = 1 << 22;

/// Which counting kernel to use: chosen per pair (`Auto`) or forced for every pair.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Kernel {
    /// Per pair, the kernel with the lowest estimated cost.
    Auto,
    /// AND + popcount of per-level bitsets.
    Bitset,
    /// Row-blocked histogram of the combined code.
    Histogram,
    /// Sparse co-occurrence of non-dominant levels.
    Sparse,
    /// One increment per row and pair.
    Naive,
}

impl Kernel {
    /// The accepted values of `TREEWISE_KERNEL`.
    pub const NAMES: [&'static str; 5] = ["auto", "bitset", "histogram", "sparse", "naive"];

    /// Parses a kernel name (case-insensitive; surrounding spaces ignored; empty means auto).
    pub fn parse(value: &str) -> Result<Kernel> {
        match value.trim().to_ascii_lowercase().as_str() {
            "" | "auto" => Ok(Kernel::Auto),
            "bitset" => Ok(Kernel::Bitset),
            "histogram" => Ok(Kernel::Histogram),
            "sparse" => Ok(Kernel::Sparse),
            "naive" => Ok(Kernel::Naive),
            _ => Err(Error::Invalid(format!(
                "{KERNEL_ENV}={value:?} is not a counting kernel; use one of {} or unset it",
                Kernel::NAMES.join(", ")
            ))),
        }
    }

    /// The kernel `TREEWISE_KERNEL` asks for (auto when it is unset).
    pub fn from_env() -> Result<Kernel> {
        match std::env::var(KERNEL_ENV) {
            Ok(value) => Kernel::parse(&value),
            Err(std::env::VarError::NotPresent) => Ok(Kernel::Auto),
            Err(std::env::VarError::NotUnicode(value)) => Err(Error::Invalid(format!(
                "{KERNEL_ENV}={value:?} is not a counting kernel; use one of {} or unset it",
                Kernel::NAMES.join(", ")
            ))),
        }
    }
}

/// One chunk's marginal counts: each column's count per code. This is also the check that
/// every code is below its column's cardinality, which keeps the kernels in bounds.
pub fn marginals(codes: &[&[u16]], cards: &[usize]) -> Result<Vec<Vec<u64>>> {
    let counted: Vec<Option<Vec<u64>>> = codes
        .par_iter()
        .zip(cards.par_iter())
        .map(|(col, &r)| marginal(col, r))
        .collect();
    counted
        .into_iter()
        .zip(cards)
        .enumerate()
        .map(|(i, (m, r))| {
            m.ok_or_else(|| Error::Invalid(format!("code column {i} has a code outside 0..{r}")))
        })
        .collect()
}

/// One column's count per code, or None if a code is not below `r`.
pub fn marginal(codes: &[u16], r: usize) -> Option<Vec<u64>> {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked just above).
        return unsafe { marginal_avx2(codes, r) };
    }
    marginal_body(codes, r)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn marginal_avx2(codes: &[u16], r: usize) -> Option<Vec<u64>> {
    marginal_body(codes, r)
}

#[inline(always)]
fn marginal_body(codes: &[u16], r: usize) -> Option<Vec<u64>> {
    let mut m = vec![0u64; r];
    // Four interleaved tallies for larger r, so that runs of one code do not wait on each other.
    let mut t = vec![0u64; if r > 8 { 4 * r } else { 0 }];
    // Chunks of 32,768 codes: read once from memory, then worked on in cache.
    for chunk in codes.chunks(1 << 15) {
        if r <= 8 {
            // Compare and count (vectorises to compares and 16-bit adds); a code outside 0..r
            // is counted by no level.
            let mut total = 0usize;
            for (l, slot) in m.iter_mut().enumerate() {
                let level = l as u16;
                let c = chunk
                    .iter()
                    .fold(0u16, |s, &x| s.wrapping_add(u16::from(x == level)));
                *slot += u64::from(c);
                total += usize::from(c);
            }
            if total != chunk.len() {
                return None;
            }
            continue;
        }
        let largest = chunk.iter().fold(0u16, |acc, &x| acc.max(x));
        if usize::from(largest) >= r {
            return None;
        }
        let mut quads = chunk.chunks_exact(4);
        for q in &mut quads {
            t[usize::from(q[0])] += 1;
            t[r + usize::from(q[1])] += 1;
            t[2 * r + usize::from(q[2])] += 1;
            t[3 * r + usize::from(q[3])] += 1;
        }
        for &c in quads.remainder() {
            t[usize::from(c)] += 1;
        }
    }
    if r > 8 {
        for (l, slot) in m.iter_mut().enumerate() {
            *slot = t[l] + t[r + l] + t[2 * r + l] + t[3 * r + l];
        }
    }
    Some(m)
}

/// Counts one batch: adds every column's counts into `marginals` and every pair's table into
/// `tables` (pair-index order, row-major `r_i x r_j`). All columns must be of one length; a code
/// outside its column's cardinality is an error, found before any count changes.
pub fn count(
    codes: &[&[u16]],
    cards: &[usize],
    marginals_out: &mut [Vec<u64>],
    tables: &mut [&mut [u64]],
    kernel: Kernel,
) -> Result<()> {
    let n = codes.first().map_or(0, |c| c.len());
    let path = Popcount::detect();
    let token = cancel::current();
    let ranges: Vec<Range<usize>> = (0..n.div_ceil(CHUNK_ROWS))
        .map(|c| c * CHUNK_ROWS..((c + 1) * CHUNK_ROWS).min(n))
        .collect();
    let slice =
        |range: &Range<usize>| -> Vec<&[u16]> { codes.iter().map(|c| &c[range.clone()]).collect() };
    // Every chunk's marginals first: they check every code before any count changes.
    let chunk_marginals = ranges
        .iter()
        .map(|range| token.check().and_then(|()| marginals(&slice(range), cards)))
        .collect::<Result<Vec<_>>>()?;
    for (range, m) in ranges.iter().zip(&chunk_marginals) {
        token.check()?;
        let chunk = slice(range);
        let plan = plan(kernel, range.len(), cards, m, path);
        count_chunk(&chunk, cards, m, &plan, path, tables)?;
    }
    for m in &chunk_marginals {
        for (acc, add) in marginals_out.iter_mut().zip(m) {
            acc.iter_mut().zip(add).for_each(|(x, y)| *x += y);
        }
    }
    Ok(())
}

/// One pair's table (row-major `r_i x r_j`) with its columns i < j.
struct PairTable<'a> {
    i: usize,
    j: usize,
    table: &'a mut [u64],
}

/// Counts one chunk of rows with `plan` into `tables`.
pub(crate) fn count_chunk(
    codes: &[&[u16]],
    cards: &[usize],
    m: &[Vec<u64>],
    plan: &Plan,
    path: Popcount,
    tables: &mut [&mut [u64]],
) -> Result<()> {
    let d = cards.len();
    if tables.len() != plan.methods.len() || codes.len() != d || m.len() != d {
        return Err(Error::Invalid(format!(
            "counting kernels: {} tables, {} methods, {} code columns and {} marginals for {d} \
             columns",
            tables.len(),
            plan.methods.len(),
            codes.len(),
            m.len()
        )));
    }
    let mut by_method: [Vec<PairTable<'_>>; 6] = Default::default();
    let mut index = 0;
    let mut rest: &mut [&mut [u64]] = tables;
    for i in 0..d {
        for j in i + 1..d {
            let Some((first, tail)) = std::mem::take(&mut rest).split_first_mut() else {
                return Err(Error::Invalid("counting kernels: too few tables".into()));
            };
            rest = tail;
            let slot = match plan.methods[index] {
                Method::Naive => 0,
                Method::Histogram => 1,
                Method::Bitset => 2,
                Method::LookupFirst => 3,
                Method::LookupSecond => 4,
                Method::Cooc => 5,
            };
            by_method[slot].push(PairTable { i, j, table: first });
            index += 1;
        }
    }
    let [naive, hist, bits, look_first, look_second, cooc] = by_method;
    let token = cancel::current();
    let ctx = Ctx {
        codes,
        cards,
        m,
        dominant: &plan.dominant,
        token,
    };
    if !naive.is_empty() {
        naive.into_par_iter().for_each(|p| {
            if token.cancelled() {
                return;
            }
            count_pair_naive(codes[p.i], codes[p.j], cards[p.j], p.table);
        });
    }
    if !hist.is_empty() {
        hist.into_par_iter().for_each_init(Vec::new, |local, p| {
            if token.cancelled() {
                return;
            }
            count_pair_histogram(
                codes[p.i], codes[p.j], cards[p.i], cards[p.j], local, p.table,
            );
        });
    }
    token.check()?;
    if !look_first.is_empty() || !look_second.is_empty() {
        count_lookup(&ctx, look_first, look_second)?;
    }
    if !bits.is_empty() {
        count_bitset(&ctx, path, bits)?;
    }
    if !cooc.is_empty() {
        count_cooc(&ctx, cooc)?;
    }
    token.check()
}

/// What every kernel reads: the chunk's codes, cardinalities, marginals and dominant levels.
struct Ctx<'a> {
    codes: &'a [&'a [u16]],
    cards: &'a [usize],
    m: &'a [Vec<u64>],
    dominant: &'a [u16],
    /// The call's cancellation token, checked once per block of rows or pair.
    token: cancel::Token,
}

impl Ctx<'_> {
    fn n(&self) -> usize {
        self.codes.first().map_or(0, |c| c.len())
    }
}

fn internal(what: &str) -> Error {
    Error::Invalid(format!(
        "internal error in the counting kernels ({what}); this is a bug, please report it with the \
         data shape and TREEWISE_KERNEL setting that triggered it"
    ))
}

/// Fills the cells of a full `ri x rj` table that were not counted, from the marginals: column
/// `ex_col` of every row but `ex_row`, then all of row `ex_row`. Every other cell must hold its
/// count; the two excluded lines must hold zeros.
fn complete(
    local: &mut [u64],
    rj: usize,
    ex_row: Option<usize>,
    ex_col: Option<usize>,
    mi: &[u64],
    mj: &[u64],
) -> Result<()> {
    if let Some(c) = ex_col {
        for (a, row) in local.chunks_exact_mut(rj).enumerate() {
            if Some(a) == ex_row {
                continue;
            }
            let counted: u64 = row.iter().sum();
            row[c] = mi[a]
                .checked_sub(counted)
                .ok_or_else(|| internal("a row of a pair table exceeds its marginal"))?;
        }
    }
    if let Some(r) = ex_row {
        let mut sums = mj.to_vec();
        for (a, row) in local.chunks_exact(rj).enumerate() {
            if a == r {
                continue;
            }
            for (s, &v) in sums.iter_mut().zip(row) {
                *s = s
                    .checked_sub(v)
                    .ok_or_else(|| internal("a column of a pair table exceeds its marginal"))?;
            }
        }
        local[r * rj..(r + 1) * rj].copy_from_slice(&sums);
    }
    Ok(())
}

fn add_into(table: &mut [u64], local: &[u64]) {
    table.iter_mut().zip(local).for_each(|(t, l)| *t += l);
}
