//! Fuzz target: `PairStats::add_codes` (every counting kernel, any batch split, merging) must give
//! exactly the counts of a naive double loop over rows and pairs, and never panic. Each input
//! checks one kernel and one way of batching, both picked by its bytes, so that an execution
//! stays cheap and the fuzzer spends its time on varied tables.
//!
//! Input layout (every byte is optional; missing bytes read as 0):
//! - byte 0: number of columns d = 1 + b % 6
//! - 2 bytes per column: cardinality selector and generation mode
//! - byte: repeat factor (the code bytes are tiled). Below 0xE0: 1 to 8. From 0xE0: 64 to 512,
//!   up to `MAX_ROWS` rows, so that the block boundaries of the kernels are crossed; such a
//!   table keeps only its first two columns (one pair is enough to cross every block, and keeps
//!   the execution cheap).
//! - byte: the kernel (`Kernel::NAMES[b % 5]`) and the batching (`b / 5 % 3`): one batch, two
//!   batches into one `PairStats`, or two `PairStats` merged
//! - byte: where to split the rows into two batches
//! - the rest: code bytes, row-major (d bytes per row)
#![no_main]

use libfuzzer_sys::fuzz_target;
use treewise_core::kernels::{Kernel, KERNEL_ENV};
use treewise_core::stats::pairs;
use treewise_core::PairStats;

/// The most rows one input may expand to: past the histogram kernel's 65,536-row blocks, and
/// well under a second per execution.
const MAX_ROWS: usize = 70_000;
/// The most table cells one input may ask for (the per-cell work of 20 tables dominates an
/// execution beyond this; the kernels' cell-count limits are far higher and tested in kernels.rs).
const MAX_CELLS: usize = 1 << 14;

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

/// How a column (cardinality `r`) turns source bytes into codes, by its mode:
/// - 0: `b % r`, uniform-ish over the levels;
/// - 1: 0 for b < 230, else `(7b + rep) % r`: dominated by level 0 (the sparse kernels' case);
/// - 2: `(b + 31 rep) % r`: drifts between repetitions, so tiled rows are not all copies;
/// - 3: `r - 1` for b < 240, else `b % r`: dominated by the last level.
///
/// As tables, so that a row costs no comparison (the fuzzer traces every comparison, which
/// made this loop the bulk of an execution): code = (add[b] + gate[b] * step(rep)) % r.
struct Coder {
    r: usize,
    add: [usize; 256],
    gate: [usize; 256],
    per_rep: usize,
}

impl Coder {
    fn new(r: usize, mode: u8) -> Self {
        let mut add = [0; 256];
        let mut gate = [0; 256];
        for b in 0..256 {
            (add[b], gate[b]) = match mode % 4 {
                0 => (b, 0),
                1 if b < 230 => (0, 0),
                1 => (7 * b, 1),
                2 => (b, 1),
                _ if b < 240 => (r - 1, 0),
                _ => (b, 0),
            };
        }
        let per_rep = if mode % 4 == 2 { 31 } else { 1 };
        Coder {
            r,
            add,
            gate,
            per_rep,
        }
    }

    /// The codes of `bytes` in repetition `rep`, appended to `out`.
    fn extend<'a>(&self, out: &mut Vec<u16>, bytes: impl Iterator<Item = &'a u8>, rep: usize) {
        let step = rep * self.per_rep;
        out.extend(bytes.map(|&b| {
            let b = usize::from(b);
            ((self.add[b] + self.gate[b] * step) % self.r) as u16
        }));
    }
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
        for (&a, &b) in codes[i].iter().zip(&codes[j]) {
            t[usize::from(a) * cards[j] + usize::from(b)] += 1;
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
    let (repeat, kept) = match bytes.next() {
        r @ 0..=0xdf => (1 + usize::from(r % 8), d),
        r => (64 * (1 + usize::from(r % 8)), d.min(2)),
    };
    let how = usize::from(bytes.next());
    let split = bytes.next();
    let body = bytes.0;
    let base = body.len() / d;
    let n = (base * repeat).min(MAX_ROWS);
    // Column c, repetition by repetition (iterators rather than indexing: the fuzzer's
    // comparison tracing makes every bounds check of a 70,000-row loop costly).
    let codes: Vec<Vec<u16>> = (0..kept)
        .map(|c| {
            let coder = Coder::new(cards[c], modes[c]);
            let mut col = Vec::with_capacity(n);
            for rep in 0..repeat {
                let left = n - col.len();
                let src = body.get(c..).unwrap_or_default().iter().step_by(d);
                coder.extend(&mut col, src.take(base.min(left)), rep);
            }
            col
        })
        .collect();
    let cards = cards[..kept].to_vec();
    let d = kept;
    let expected = naive(&cards, &codes);
    let cut = n * usize::from(split) / 255;
    let first: Vec<Vec<u16>> = codes.iter().map(|c| c[..cut].to_vec()).collect();
    let second: Vec<Vec<u16>> = codes.iter().map(|c| c[cut..].to_vec()).collect();

    let name = Kernel::NAMES[how % Kernel::NAMES.len()];
    std::env::set_var(KERNEL_ENV, name);
    let mut stats = PairStats::new(cards.clone()).expect("small tables fit");
    match how / Kernel::NAMES.len() % 3 {
        0 => stats.add_codes(&codes).expect("valid codes count"),
        1 => {
            stats.add_codes(&first).expect("valid codes count");
            stats.add_codes(&second).expect("valid codes count");
        }
        _ => {
            let mut other = PairStats::new(cards.clone()).expect("small tables fit");
            other.add_codes(&second).expect("valid codes count");
            stats.add_codes(&first).expect("valid codes count");
            stats.merge(&other).expect("same cardinalities merge");
        }
    }
    std::env::remove_var(KERNEL_ENV);
    assert_eq!(
        stats, expected,
        "kernel {name}, batching {how}, split at {cut}"
    );

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
