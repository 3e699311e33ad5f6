//! Fuzz target: `PairStats::add_codes` (every counting kernel, any batch split, merging) must give
//! exactly the counts of a naive double loop over rows and pairs, and never panic.
//!
//! Input layout (every byte is optional; missing bytes read as 0):
//! - byte 0: number of columns d = 1 + b % 6
//! - 2 bytes per column: cardinality selector and generation mode
//! - byte: repeat factor (the code bytes are tiled to reach block boundaries of the kernels)
//! - byte: where to split the rows into two batches
//! - the rest: code bytes, row-major (d bytes per row)
#![no_main]

use libfuzzer_sys::fuzz_target;
use treewise_core::kernels::{Kernel, KERNEL_ENV};
use treewise_core::stats::pairs;
use treewise_core::PairStats;

/// The most rows one input may expand to (keeps an execution well under a second).
const MAX_ROWS: usize = 70_000;
/// The most table cells one input may ask for.
const MAX_CELLS: usize = 1 << 18;

struct Bytes<'a>(&'a [u8]);

impl Bytes<'_> {
    fn next(&mut self) -> u8 {
        match self.0.split_first() {
            Some((b, rest)) => {
                self.0 = rest;
                *b
            }
            None => 0,
        }
    }
}

/// Code of column `c` (cardinality `r`, mode `mode`) at a row, from its source byte and the
/// repetition the row belongs to.
fn code(byte: u8, rep: usize, r: usize, mode: u8) -> u16 {
    let b = usize::from(byte);
    let k = match mode % 4 {
        // Uniform-ish over the levels.
        0 => b % r,
        // Dominated by level 0 (the sparse kernel's case): ~10% of rows elsewhere.
        1 if b < 230 => 0,
        1 => (b * 7 + rep) % r,
        // Drifts between repetitions, so tiled rows are not all copies.
        2 => (b + rep * 31) % r,
        // Dominated by the last level.
        _ if b < 240 => r - 1,
        _ => b % r,
    };
    k as u16
}

fn naive(cards: &[usize], codes: &[Vec<u16>]) -> PairStats {
    let d = cards.len();
    let n = codes.first().map_or(0, Vec::len);
    let marginals: Vec<Vec<u64>> = (0..d)
        .map(|c| {
            let mut m = vec![0u64; cards[c]];
            codes[c].iter().for_each(|&x| m[usize::from(x)] += 1);
            m
        })
        .collect();
    let mut cells = Vec::new();
    for (i, j) in pairs(d) {
        let mut t = vec![0u64; cards[i] * cards[j]];
        for row in 0..n {
            t[usize::from(codes[i][row]) * cards[j] + usize::from(codes[j][row])] += 1;
        }
        cells.extend(t);
    }
    match PairStats::from_parts(n as u64, cards.to_vec(), marginals, cells) {
        Ok(s) => s,
        Err(e) => panic!("the naive counts are inconsistent: {e}"),
    }
}

fuzz_target!(|data: &[u8]| {
    let mut bytes = Bytes(data);
    let d = 1 + usize::from(bytes.next()) % 6;
    let mut cards = Vec::with_capacity(d);
    let mut modes = Vec::with_capacity(d);
    for _ in 0..d {
        let sel = bytes.next();
        let mode = bytes.next();
        // Mostly small (bitset territory), sometimes up to a few hundred (histograms).
        let r = if sel & 0x80 == 0 {
            1 + usize::from(sel % 16)
        } else {
            1 + usize::from(sel & 0x7f) * 3
        };
        cards.push(r);
        modes.push(mode);
    }
    let cells: usize = pairs(d).iter().map(|&(i, j)| cards[i] * cards[j]).sum();
    if cells > MAX_CELLS {
        return;
    }
    let repeat = 1 + usize::from(bytes.next()) % 64;
    let split = bytes.next();
    let body = bytes.0;
    let base = body.len() / d;
    let n = (base * repeat).min(MAX_ROWS);
    let codes: Vec<Vec<u16>> = (0..d)
        .map(|c| {
            (0..n)
                .map(|row| code(body[(row % base) * d + c], row / base, cards[c], modes[c]))
                .collect()
        })
        .collect();
    let expected = naive(&cards, &codes);
    let cut = n * usize::from(split) / 255;
    let first: Vec<Vec<u16>> = codes.iter().map(|c| c[..cut].to_vec()).collect();
    let second: Vec<Vec<u16>> = codes.iter().map(|c| c[cut..].to_vec()).collect();

    for name in Kernel::NAMES {
        std::env::set_var(KERNEL_ENV, name);
        // One batch.
        let mut whole = PairStats::new(cards.clone()).expect("small tables fit");
        whole.add_codes(&codes).expect("valid codes count");
        assert_eq!(whole, expected, "kernel {name}, one batch");
        // Two batches into one PairStats, and two PairStats merged.
        let mut split_stats = PairStats::new(cards.clone()).expect("small tables fit");
        split_stats.add_codes(&first).expect("valid codes count");
        split_stats.add_codes(&second).expect("valid codes count");
        assert_eq!(split_stats, expected, "kernel {name}, split at {cut}");
        let mut other = PairStats::new(cards.clone()).expect("small tables fit");
        other.add_codes(&second).expect("valid codes count");
        let mut merged = PairStats::new(cards.clone()).expect("small tables fit");
        merged.add_codes(&first).expect("valid codes count");
        merged.merge(&other).expect("same cardinalities merge");
        assert_eq!(merged, expected, "kernel {name}, merged at {cut}");
    }
    std::env::remove_var(KERNEL_ENV);

    // A code out of range is an error that leaves the counts unchanged, never a panic.
    if let Some((c, row)) = (n > 0).then(|| (usize::from(split) % d, n / 2)) {
        let mut bad = codes.clone();
        bad[c][row] = cards[c] as u16;
        let mut stats = PairStats::new(cards.clone()).expect("small tables fit");
        assert!(
            stats.add_codes(&bad).is_err(),
            "an out-of-range code was accepted"
        );
        assert_eq!(stats.n_rows(), 0);
        assert!(stats.cells().iter().all(|&x| x == 0));
    }
});
