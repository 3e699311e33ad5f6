//! The memory limit: how many bytes the large allocations need, checked before they are made.
//!
//! The limit comes from the caller (`memory_limit` in Python, a share of the machine's memory by
//! default). Each check sums the parts a step is about to hold and refuses with
//! [`Error::MemoryLimit`] when they pass it, naming the parts, the limit and what to change.
//! `stats::MAX_CELLS` stays as the hard cap below any limit.

use crate::codebook::{Codebook, Values};
use crate::error::{Error, Result};
use crate::stats::{cell_count, pair_count};

/// Scratch the bitset kernel takes for its per-level bitsets of one block of rows (16 MiB).
const BITSET_SCRATCH: u64 = 16 << 20;

/// The bytes a `PairStats` over columns with these cardinalities holds: every pair's table,
/// every column's marginal counts (all u64) and where each table starts. The one-pass fit can
/// check its provisional state against the same limit with this.
pub fn pair_stats_bytes(cards: &[usize]) -> u64 {
    let marginals: u64 = cards.iter().map(|&r| r as u64).sum();
    let offsets = pair_count(cards.len()) as u64 + 1;
    cell_count(cards)
        .saturating_add(marginals)
        .saturating_add(offsets)
        .saturating_mul(8)
}

/// The most that counting one batch of `rows` rows adds on top of the `PairStats`: the batch's
/// codes (u16 per cell) and the kernels' scratch, at most one u32 counter per table cell and
/// thread (the sparse kernel's per-thread counters, the bitset kernel's u64 Gram rows) plus the
/// bitsets of one block.
pub fn counting_bytes(cards: &[usize], rows: usize, threads: usize) -> u64 {
    let codes = (cards.len() as u64)
        .saturating_mul(rows as u64)
        .saturating_mul(2);
    let scratch = cell_count(cards).saturating_mul(4 * threads.max(2) as u64);
    codes.saturating_add(scratch).saturating_add(BITSET_SCRATCH)
}

/// The bytes a model's tail tables add beside the codebook's: per value behind "other", its
/// ln P(value | other) and its sampling table (two f64).
pub fn tail_table_bytes(codebook: &Codebook) -> u64 {
    codebook
        .columns()
        .iter()
        .filter_map(|c| c.shape().tail.as_ref())
        .map(|t| (t.counts.len() as u64 + 1).saturating_mul(16))
        .fold(0, u64::saturating_add)
}

/// The bytes of `count` sampled rows: a u16 code per cell, an f64 per numeric cell and a u32
/// per cell of a column with a tail table.
pub fn sample_bytes(codebook: &Codebook, count: usize) -> u64 {
    let per_row: u64 = codebook
        .columns()
        .iter()
        .map(|c| {
            2 + if matches!(c.values(), Values::Bins { .. }) {
                8
            } else {
                0
            } + if c.shape().tail.is_some() { 4 } else { 0 }
        })
        .sum();
    per_row.saturating_mul(count as u64)
}

/// The bytes scoring `rows` rows of `columns` columns returns (an f64 per row, and per cell
/// with `surprisal`), plus the codes of one call of `slice_rows` rows.
pub fn score_bytes(columns: usize, rows: usize, slice_rows: usize, surprisal: bool) -> u64 {
    let per_row = 8 + if surprisal { 8 * columns as u64 } else { 0 };
    let codes = (columns as u64).saturating_mul(rows.min(slice_rows) as u64 * 2);
    per_row.saturating_mul(rows as u64).saturating_add(codes)
}

/// Bytes as a short figure in binary units ("1.5 GiB").
pub fn human(bytes: u64) -> String {
    const UNITS: [&str; 6] = ["bytes", "KiB", "MiB", "GiB", "TiB", "PiB"];
    let mut value = bytes as f64;
    let mut unit = 0;
    while value >= 1024.0 && unit + 1 < UNITS.len() {
        value /= 1024.0;
        unit += 1;
    }
    if unit == 0 {
        format!("{bytes} bytes")
    } else {
        format!("{value:.1} {}", UNITS[unit])
    }
}

/// Refuses `what` when its `parts` (name, bytes) add up to more than `limit` (None: no limit).
/// `advice` says what to change besides raising the limit.
pub fn check(what: &str, parts: &[(&str, u64)], limit: Option<u64>, advice: &str) -> Result<()> {
    let Some(limit) = limit else {
        return Ok(());
    };
    let needed = parts.iter().map(|p| p.1).fold(0, u64::saturating_add);
    if needed <= limit {
        return Ok(());
    }
    let detail = parts
        .iter()
        .filter(|p| p.1 > 0)
        .map(|(name, bytes)| format!("{name} {}", human(*bytes)))
        .collect::<Vec<_>>()
        .join(", ");
    Err(Error::MemoryLimit(format!(
        "{what} needs about {} ({detail}), more than the memory limit of {} in force; raise \
         memory_limit (for example memory_limit=\"80%\" or \"16GiB\"), or {advice}",
        human(needed),
        human(limit)
    )))
}

/// What to change when the pair statistics do not fit.
pub const FIT_ADVICE: &str = "lower max_categories or n_bins, leave columns out (columns=...), \
     or model the widest columns as numeric or leave them out with kinds={'column': 'numeric'} or \
     kinds={'column': 'ignore'}";

/// Checks that counting pairs over `cards` fits in `limit`: the `PairStats`, the scratch of
/// counting one batch of `rows` rows on `threads` threads, and the model's tail tables.
pub fn check_fit(
    cards: &[usize],
    rows: usize,
    threads: usize,
    tails: u64,
    limit: Option<u64>,
) -> Result<()> {
    check(
        &format!("counting the pairs of {} columns", cards.len()),
        &[
            ("pair statistics", pair_stats_bytes(cards)),
            ("counting a batch", counting_bytes(cards, rows, threads)),
            ("tail tables", tails),
        ],
        limit,
        FIT_ADVICE,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pair_stats_bytes_counts_tables_marginals_and_offsets() {
        // Cardinalities 2, 3, 4: tables 6 + 8 + 12 = 26 cells, 9 marginal counts, 4 offsets.
        assert_eq!(pair_stats_bytes(&[2, 3, 4]), (26 + 9 + 4) * 8);
    }

    #[test]
    fn the_check_names_the_parts_and_the_limit() {
        assert!(check("x", &[("a", 10)], Some(10), "y").is_ok());
        assert!(check("x", &[("a", u64::MAX)], None, "y").is_ok());
        match check(
            "fitting",
            &[("a", 3 << 30), ("b", 1 << 29)],
            Some(1 << 30),
            "do less",
        ) {
            Err(Error::MemoryLimit(m)) => {
                assert!(m.contains("3.5 GiB"), "{m}");
                assert!(m.contains("a 3.0 GiB, b 512.0 MiB"), "{m}");
                assert!(m.contains("limit of 1.0 GiB"), "{m}");
                assert!(m.ends_with("do less"), "{m}");
            }
            other => panic!("{other:?}"),
        }
    }
}
