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

use std::ops::Range;

use rayon::prelude::*;

use crate::error::{Error, Result};

/// The environment variable that forces one counting kernel for every pair.
pub const KERNEL_ENV: &str = "TREEWISE_KERNEL";

/// Rows counted at once: bounds the memory of bitsets, row lists and sparse entries, and keeps
/// every block-local u32 counter and u32 row index far from overflow.
const CHUNK_ROWS: usize = 1 << 22;
/// The bitset memory one block of rows may take (in u64 words: 16 MiB). Longer blocks amortise
/// each tile's set-up; the tiles stream their partners' bitsets from cache.
const BITSET_BUDGET_WORDS: usize = 1 << 21;
/// The longest bitset of one block, in u64 words (32,768 rows: 4 KiB, so a tile stays in L1).
const BITSET_MAX_WORDS: usize = 512;
/// Rows of one sparse sub-block, at most (row numbers within it fit in u16); fewer when rows hold
/// many entries, so that a block's entries take about 8 MiB.
const SPARSE_BLOCK_ROWS: usize = 1 << 15;
/// Entries (non-dominant column levels) one sparse sub-block aims at.
const SPARSE_BLOCK_ENTRIES: usize = 1 << 20;
/// The largest table the histogram kernel gives block-local counters (16 MiB of u32).
const HISTOGRAM_MAX_CELLS: usize = 1 << 22;
/// Rows per histogram block, at least (block-local u32 counters are merged after each block).
const HISTOGRAM_BLOCK_ROWS: usize = 1 << 16;

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

/// How the bitset kernel counts bits, picked at run time from what the CPU offers.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Popcount {
    /// AVX2: nibble lookup (`vpshufb`) into byte counters, summed with `vpsadbw`.
    Avx2,
    /// The POPCNT instruction on each word.
    Popcnt,
    /// `u64::count_ones` compiled for the baseline target.
    Portable,
}

impl Popcount {
    /// The fastest way this CPU offers.
    pub fn detect() -> Popcount {
        if Popcount::Avx2.available() {
            Popcount::Avx2
        } else if Popcount::Popcnt.available() {
            Popcount::Popcnt
        } else {
            Popcount::Portable
        }
    }

    /// Whether this CPU can run this way of counting.
    pub fn available(self) -> bool {
        match self {
            #[cfg(target_arch = "x86_64")]
            Popcount::Avx2 => std::arch::is_x86_feature_detected!("avx2"),
            #[cfg(target_arch = "x86_64")]
            Popcount::Popcnt => std::arch::is_x86_feature_detected!("popcnt"),
            Popcount::Portable => true,
            #[cfg(not(target_arch = "x86_64"))]
            _ => false,
        }
    }

    /// Every way this CPU can run (for tests and benchmarks).
    pub fn all_available() -> Vec<Popcount> {
        [Popcount::Avx2, Popcount::Popcnt, Popcount::Portable]
            .into_iter()
            .filter(|p| p.available())
            .collect()
    }

    /// Estimated nanoseconds per (table cell x 64 rows) on one thread.
    fn cost_per_cell_word(self) -> f64 {
        match self {
            Popcount::Avx2 => 0.25,
            Popcount::Popcnt => 0.45,
            Popcount::Portable => 1.0,
        }
    }
}

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

/// The index of pair (i, j), i < j, among the pairs of `d` columns.
fn pair_index(d: usize, i: usize, j: usize) -> usize {
    i * d - i * (i + 1) / 2 + (j - i - 1)
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
    let ranges: Vec<Range<usize>> = (0..n.div_ceil(CHUNK_ROWS))
        .map(|c| c * CHUNK_ROWS..((c + 1) * CHUNK_ROWS).min(n))
        .collect();
    let slice =
        |range: &Range<usize>| -> Vec<&[u16]> { codes.iter().map(|c| &c[range.clone()]).collect() };
    // Every chunk's marginals first: they check every code before any count changes.
    let chunk_marginals = ranges
        .iter()
        .map(|range| marginals(&slice(range), cards))
        .collect::<Result<Vec<_>>>()?;
    for (range, m) in ranges.iter().zip(&chunk_marginals) {
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

/// Chooses a method for every pair of one chunk of `n` rows.
pub(crate) fn plan(
    kernel: Kernel,
    n: usize,
    cards: &[usize],
    m: &[Vec<u64>],
    path: Popcount,
) -> Plan {
    let d = cards.len();
    let npairs = d * d.saturating_sub(1) / 2;
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
    let ctx = Ctx {
        codes,
        cards,
        m,
        dominant: &plan.dominant,
    };
    if !naive.is_empty() {
        naive.into_par_iter().for_each(|p| {
            count_pair_naive(codes[p.i], codes[p.j], cards[p.j], p.table);
        });
    }
    if !hist.is_empty() {
        hist.into_par_iter().for_each_init(Vec::new, |local, p| {
            count_pair_histogram(
                codes[p.i], codes[p.j], cards[p.i], cards[p.j], local, p.table,
            );
        });
    }
    if !look_first.is_empty() || !look_second.is_empty() {
        count_lookup(&ctx, look_first, look_second)?;
    }
    if !bits.is_empty() {
        count_bitset(&ctx, path, bits)?;
    }
    if !cooc.is_empty() {
        count_cooc(&ctx, cooc)?;
    }
    Ok(())
}

/// What every kernel reads: the chunk's codes, cardinalities, marginals and dominant levels.
struct Ctx<'a> {
    codes: &'a [&'a [u16]],
    cards: &'a [usize],
    m: &'a [Vec<u64>],
    dominant: &'a [u16],
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

// -- naive and histogram -------------------------------------------------------------------------

/// One increment per row: the definition.
fn count_pair_naive(a: &[u16], b: &[u16], rb: usize, table: &mut [u64]) {
    for (&x, &y) in a.iter().zip(b) {
        table[usize::from(x) * rb + usize::from(y)] += 1;
    }
}

/// A histogram of the combined code in block-local u32 counters, merged into `table` per block.
fn count_pair_histogram(
    a: &[u16],
    b: &[u16],
    ra: usize,
    rb: usize,
    local: &mut Vec<u32>,
    table: &mut [u64],
) {
    let cells = ra * rb;
    if cells > HISTOGRAM_MAX_CELLS {
        // Block-local counters as big as the table would only add memory: count in place.
        count_pair_naive(a, b, rb, table);
        return;
    }
    local.clear();
    local.resize(cells, 0);
    // A block of at least 65,536 rows (2 x 128 KiB of codes), longer for big tables so that
    // clearing the counters stays cheap next to counting.
    let block = (2 * cells).max(HISTOGRAM_BLOCK_ROWS);
    for (ca, cb) in a.chunks(block).zip(b.chunks(block)) {
        let largest = |c: &[u16]| usize::from(c.iter().fold(0u16, |m, &x| m.max(x)));
        let len = ca.len().min(cb.len());
        if !ca.is_empty() && largest(ca) < ra && largest(cb) < rb && local.len() == cells {
            let counters = local.as_mut_ptr();
            for (&x, &y) in ca[..len].iter().zip(&cb[..len]) {
                let cell = usize::from(x) * rb + usize::from(y);
                // SAFETY: x < ra and y < rb (the maxima were just checked), so
                // cell <= (ra - 1) * rb + rb - 1 < ra * rb = cells = local.len().
                unsafe { *counters.add(cell) += 1 };
            }
        } else {
            for (&x, &y) in ca.iter().zip(cb) {
                local[usize::from(x) * rb + usize::from(y)] += 1;
            }
        }
        for (t, l) in table.iter_mut().zip(local.iter_mut()) {
            *t += u64::from(*l);
            *l = 0;
        }
    }
}

// -- sparse: lookup and co-occurrence ------------------------------------------------------------

/// Calls `f(row, code)` for every row of `col` (in order) whose code is not `dominant`.
#[inline(always)]
fn for_each_nondominant(col: &[u16], dominant: u16, mut f: impl FnMut(usize, u16)) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked just above).
        unsafe { nondominant_avx2(col, dominant, &mut f) };
        return;
    }
    nondominant_scalar(col, dominant, &mut f);
}

#[inline(always)]
fn nondominant_scalar(col: &[u16], dominant: u16, f: &mut impl FnMut(usize, u16)) {
    for (ci, chunk) in col.chunks(32).enumerate() {
        // Skip whole chunks at the dominant level (vectorises to xor + or).
        if chunk.iter().fold(0u16, |acc, &c| acc | (c ^ dominant)) == 0 {
            continue;
        }
        for (t, &c) in chunk.iter().enumerate() {
            if c != dominant {
                f(ci * 32 + t, c);
            }
        }
    }
}

/// `for_each_nondominant` with AVX2: 32 codes per compare, then one call per set mask bit.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn nondominant_avx2(col: &[u16], dominant: u16, f: &mut impl FnMut(usize, u16)) {
    use std::arch::x86_64::*;
    let dom = _mm256_set1_epi16(dominant as i16);
    let groups = col.chunks_exact(32);
    let tail = groups.remainder();
    for (g, chunk) in groups.enumerate() {
        let p = chunk.as_ptr().cast::<__m256i>();
        // SAFETY: `chunk` holds 32 u16 = two 32-byte vectors; loadu takes any alignment.
        let (c0, c1) = unsafe { (_mm256_loadu_si256(p), _mm256_loadu_si256(p.add(1))) };
        let eq = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
            _mm256_cmpeq_epi16(c0, dom),
            _mm256_cmpeq_epi16(c1, dom),
        ));
        let mut other = !(_mm256_movemask_epi8(eq) as u32);
        while other != 0 {
            let t = other.trailing_zeros() as usize;
            f(g * 32 + t, chunk[t]);
            other &= other - 1;
        }
    }
    let base = col.len() - tail.len();
    for (t, &c) in tail.iter().enumerate() {
        if c != dominant {
            f(base + t, c);
        }
    }
}

/// The rows (in order) where `col` is not at `dominant`.
fn nondominant_rows(col: &[u16], dominant: u16) -> Vec<u32> {
    let mut rows = Vec::new();
    for_each_nondominant(col, dominant, |row, _| rows.push(row as u32));
    rows
}

/// Pairs with one sparse side: count the rows where that side is not dominant, derive the rest.
fn count_lookup(
    ctx: &Ctx<'_>,
    first: Vec<PairTable<'_>>,
    second: Vec<PairTable<'_>>,
) -> Result<()> {
    let d = ctx.cards.len();
    let mut needed = vec![false; d];
    first.iter().for_each(|p| needed[p.i] = true);
    second.iter().for_each(|p| needed[p.j] = true);
    let rows: Vec<Option<Vec<u32>>> = (0..d)
        .into_par_iter()
        .map(|c| needed[c].then(|| nondominant_rows(ctx.codes[c], ctx.dominant[c])))
        .collect();
    let tasks: Vec<(bool, PairTable<'_>)> = first
        .into_iter()
        .map(|p| (true, p))
        .chain(second.into_iter().map(|p| (false, p)))
        .collect();
    tasks
        .into_par_iter()
        .try_for_each_init(Vec::new, |sums: &mut Vec<u64>, (on_first, p)| {
            // Count straight into the table; the walked rows' totals per level of the other
            // column give the dominant line: marginal minus what was counted outside it.
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let side = if on_first { p.i } else { p.j };
            let list = rows[side]
                .as_deref()
                .ok_or_else(|| internal("missing row list"))?;
            let (a, b) = (ctx.codes[p.i], ctx.codes[p.j]);
            sums.clear();
            sums.resize(if on_first { rj } else { ri }, 0);
            for &k in list {
                let k = k as usize;
                let (x, y) = (usize::from(a[k]), usize::from(b[k]));
                p.table[x * rj + y] += 1;
                sums[if on_first { y } else { x }] += 1;
            }
            let short = || internal("a pair table exceeds a marginal");
            if on_first {
                let row = usize::from(ctx.dominant[p.i]) * rj;
                for (y, (&m, &c)) in ctx.m[p.j].iter().zip(sums.iter()).enumerate() {
                    p.table[row + y] += m.checked_sub(c).ok_or_else(short)?;
                }
            } else {
                let col = usize::from(ctx.dominant[p.j]);
                for (x, (&m, &c)) in ctx.m[p.i].iter().zip(sums.iter()).enumerate() {
                    p.table[x * rj + col] += m.checked_sub(c).ok_or_else(short)?;
                }
            }
            Ok(())
        })
}

/// The sparse set's layout: its columns, their inner levels and where each pair's cells live.
struct SparseSet {
    /// Global column of each member.
    cols: Vec<usize>,
    /// Dominant level of each member.
    dom: Vec<u16>,
    /// Non-dominant levels of each member (its cardinality minus one).
    k: Vec<usize>,
    /// Start of each member pair's `k_p x k_q` cells, in pair-index order over members.
    off: Vec<usize>,
    total: usize,
    /// Rows per sub-block.
    block_rows: usize,
}

impl SparseSet {
    /// A level's index among its column's non-dominant levels.
    fn inner(level: u16, dom: u16) -> usize {
        usize::from(level) - usize::from(level > dom)
    }
}

/// Pairs within the sparse set: enumerate each row's co-occurring non-dominant entries.
fn count_cooc(ctx: &Ctx<'_>, pairs: Vec<PairTable<'_>>) -> Result<()> {
    let d = ctx.cards.len();
    let mut member = vec![false; d];
    for p in &pairs {
        member[p.i] = true;
        member[p.j] = true;
    }
    let cols: Vec<usize> = (0..d).filter(|&c| member[c]).collect();
    let s = cols.len();
    let mut pos = vec![usize::MAX; d];
    for (x, &c) in cols.iter().enumerate() {
        pos[c] = x;
    }
    let dom: Vec<u16> = cols.iter().map(|&c| ctx.dominant[c]).collect();
    let k: Vec<usize> = cols
        .iter()
        .map(|&c| ctx.cards[c].saturating_sub(1))
        .collect();
    let mut off = Vec::with_capacity(s * s.saturating_sub(1) / 2 + 1);
    off.push(0);
    for p in 0..s {
        for q in p + 1..s {
            let last = off.last().copied().unwrap_or(0);
            off.push(last + k[p] * k[q]);
        }
    }
    let total = off.last().copied().unwrap_or(0);
    let n = ctx.n();
    let entries: u64 = cols
        .iter()
        .map(|&c| n as u64 - ctx.m[c][usize::from(ctx.dominant[c])])
        .sum();
    let per_row = (entries / (n as u64).max(1)) as usize + 1;
    let block_rows = (SPARSE_BLOCK_ENTRIES / per_row).clamp(256, SPARSE_BLOCK_ROWS) / 32 * 32;
    let set = SparseSet {
        cols,
        dom,
        k,
        off,
        total,
        block_rows,
    };
    // One contiguous range of rows per thread, each with its own u32 counters.
    let parts = rayon::current_num_threads().clamp(1, n.div_ceil(set.block_rows).max(1));
    let ranges: Vec<Range<usize>> = (0..parts)
        .map(|t| (n * t / parts)..(n * (t + 1) / parts))
        .collect();
    let partials: Vec<Vec<u32>> = ranges
        .into_par_iter()
        .map(|range| cooc_range(ctx, &set, range))
        .collect();
    let mut inner = vec![0u64; set.total];
    for part in &partials {
        inner
            .iter_mut()
            .zip(part)
            .for_each(|(x, &y)| *x += u64::from(y));
    }
    drop(partials);
    pairs
        .into_par_iter()
        .try_for_each_init(Vec::new, |local: &mut Vec<u64>, p| {
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let (pi, pj) = (pos[p.i], pos[p.j]);
            if pi >= s || pj >= s {
                return Err(internal("a co-occurrence pair outside the sparse set"));
            }
            let (di, dj) = (set.dom[pi], set.dom[pj]);
            let start = set.off[pair_index(s, pi, pj)];
            let kq = set.k[pj];
            if ri == 2 && rj == 2 {
                // Two binary columns: one counted cell, three from the marginals.
                let (a, b) = (1 - usize::from(di), 1 - usize::from(dj));
                let (di, dj) = (usize::from(di), usize::from(dj));
                let (mi, mj) = (&ctx.m[p.i], &ctx.m[p.j]);
                let both = inner[start];
                let short = || internal("a pair table exceeds a marginal");
                let a_only = mi[a].checked_sub(both).ok_or_else(short)?;
                let b_only = mj[b].checked_sub(both).ok_or_else(short)?;
                let neither = mi[di].checked_sub(b_only).ok_or_else(short)?;
                p.table[a * 2 + b] += both;
                p.table[a * 2 + dj] += a_only;
                p.table[di * 2 + b] += b_only;
                p.table[di * 2 + dj] += neither;
                return Ok(());
            }
            local.clear();
            local.resize(ri * rj, 0);
            for a in 0..ri {
                if a == usize::from(di) {
                    continue;
                }
                let la = SparseSet::inner(a as u16, di);
                for b in 0..rj {
                    if b == usize::from(dj) {
                        continue;
                    }
                    let lb = SparseSet::inner(b as u16, dj);
                    local[a * rj + b] = inner[start + la * kq + lb];
                }
            }
            complete(
                local,
                rj,
                Some(usize::from(di)),
                Some(usize::from(dj)),
                &ctx.m[p.i],
                &ctx.m[p.j],
            )?;
            add_into(p.table, local);
            Ok(())
        })
}

/// Co-occurrence counts of one range of rows, in u32 (a range is at most one chunk of rows).
fn cooc_range(ctx: &Ctx<'_>, set: &SparseSet, range: Range<usize>) -> Vec<u32> {
    let s = set.cols.len();
    let mut counts = vec![0u32; set.total];
    // Where pair (p, q)'s index starts: pair_index(s, p, q) = row_start[p] + q (wrapping).
    let row_start: Vec<usize> = (0..s)
        .map(|p| (p * s).wrapping_sub(p * (p + 1) / 2 + p + 1))
        .collect();
    let mut ent_row: Vec<u16> = Vec::new();
    let mut ent_val: Vec<(u32, u16)> = Vec::new();
    let mut sorted: Vec<(u32, u16)> = Vec::new();
    let mut starts: Vec<u32> = Vec::new();
    let mut block = range.start;
    while block < range.end {
        let end = (block + set.block_rows).min(range.end);
        let len = end - block;
        ent_row.clear();
        ent_val.clear();
        // Column by column: the non-dominant entries of this block, as (row, member, level).
        for (p, &c) in set.cols.iter().enumerate() {
            let dom = set.dom[p];
            let col = &ctx.codes[c][block..end];
            for_each_nondominant(col, dom, |row, x| {
                ent_row.push(row as u16);
                ent_val.push((p as u32, SparseSet::inner(x, dom) as u16));
            });
        }
        // Group by row (a stable counting sort keeps each row's members in ascending order).
        starts.clear();
        starts.resize(len + 1, 0);
        for &r in &ent_row {
            starts[usize::from(r) + 1] += 1;
        }
        for t in 0..len {
            starts[t + 1] += starts[t];
        }
        sorted.clear();
        sorted.resize(ent_val.len(), (0, 0));
        {
            let mut next: Vec<u32> = starts[..len].to_vec();
            for (&r, &v) in ent_row.iter().zip(&ent_val) {
                let slot = &mut next[usize::from(r)];
                sorted[*slot as usize] = v;
                *slot += 1;
            }
        }
        for t in 0..len {
            let row = &sorted[starts[t] as usize..starts[t + 1] as usize];
            for (x, &(p, la)) in row.iter().enumerate() {
                let p = p as usize;
                let base = row_start[p];
                for &(q, lb) in &row[x + 1..] {
                    let q = q as usize;
                    let cell = set.off[base.wrapping_add(q)]
                        + usize::from(la) * set.k[q]
                        + usize::from(lb);
                    counts[cell] += 1;
                }
            }
        }
        block = end;
    }
    counts
}

// -- bitsets -------------------------------------------------------------------------------------

/// Pairs counted by AND + popcount over per-level bitsets, block of rows by block of rows.
fn count_bitset(ctx: &Ctx<'_>, path: Popcount, pairs: Vec<PairTable<'_>>) -> Result<()> {
    let d = ctx.cards.len();
    let n = ctx.n();
    let k: Vec<usize> = ctx.cards.iter().map(|&r| r.saturating_sub(1)).collect();
    // Partners of each column (j > i) and the bitset rows of the needed columns.
    let mut partners: Vec<Vec<usize>> = vec![Vec::new(); d];
    let mut needed = vec![false; d];
    for p in &pairs {
        partners[p.i].push(p.j);
        needed[p.i] = true;
        needed[p.j] = true;
    }
    let mut base = vec![usize::MAX; d];
    let mut rows_total = 0;
    for c in 0..d {
        if needed[c] {
            base[c] = rows_total;
            rows_total += k[c];
        }
    }
    // Per column: the bitset rows of its partners' levels (y), and where each partner starts.
    let ylist: Vec<Vec<usize>> = (0..d)
        .map(|c| {
            partners[c]
                .iter()
                .flat_map(|&j| base[j]..base[j] + k[j])
                .collect()
        })
        .collect();
    // Gram cells: for column c, k_c rows of |ylist(c)| cells; `gram_off[c]` is where they start.
    let mut gram_off = vec![0usize; d + 1];
    for c in 0..d {
        gram_off[c + 1] = gram_off[c] + k[c] * ylist[c].len();
    }
    let mut gram = vec![0u64; gram_off[d]];
    // Tasks: one or two consecutive levels of one column against all its partners' levels.
    struct Task<'g> {
        col: usize,
        level: usize,
        out: &'g mut [u64],
    }
    let mut tasks: Vec<Task<'_>> = Vec::new();
    {
        let mut rest: &mut [u64] = &mut gram;
        for c in 0..d {
            let len = ylist[c].len();
            if len == 0 {
                continue;
            }
            let mut level = 0;
            while level < k[c] {
                let rows = (k[c] - level).min(2);
                let (head, tail) = std::mem::take(&mut rest).split_at_mut(rows * len);
                tasks.push(Task {
                    col: c,
                    level,
                    out: head,
                });
                rest = tail;
                level += rows;
            }
        }
    }
    // Rows per block: a multiple of 512 (whole AVX2 vectors), within the memory budget.
    let words_max = (BITSET_BUDGET_WORDS / rows_total.max(1)).clamp(32, BITSET_MAX_WORDS) / 8 * 8;
    let block_rows = words_max * 64;
    let stride = n.min(block_rows).div_ceil(64).div_ceil(8) * 8;
    let mut bits = vec![0u64; rows_total * stride];
    let mut start = 0;
    while start < n {
        let end = (start + block_rows).min(n);
        let words = (end - start).div_ceil(64).div_ceil(4) * 4;
        // Build every needed column's bitsets for this block.
        {
            let mut parts: Vec<(usize, &mut [u64])> = Vec::new();
            let mut rest: &mut [u64] = &mut bits;
            for c in 0..d {
                if needed[c] {
                    let (head, tail) = std::mem::take(&mut rest).split_at_mut(k[c] * stride);
                    parts.push((c, head));
                    rest = tail;
                }
            }
            parts.into_par_iter().for_each(|(c, out)| {
                build_bitsets(&ctx.codes[c][start..end], k[c], stride, out);
            });
        }
        let bits = &bits;
        let row = |r: usize| &bits[r * stride..r * stride + words];
        tasks.par_iter_mut().for_each(|t| {
            let len = ylist[t.col].len();
            let rows = t.out.len() / len.max(1);
            let a: Vec<&[u64]> = (0..rows).map(|x| row(base[t.col] + t.level + x)).collect();
            let b: Vec<&[u64]> = ylist[t.col].iter().map(|&y| row(y)).collect();
            inner_counts(path, &a, &b, words, t.out);
        });
        start = end;
    }
    drop(tasks);
    // Each pair's inner cells from the Gram rows, then its last row and column from marginals.
    let mut partner_at: Vec<Vec<usize>> = vec![Vec::new(); d];
    for c in 0..d {
        let mut at = 0;
        for &j in &partners[c] {
            partner_at[c].push(at);
            at += k[j];
        }
    }
    let mut order: Vec<Vec<usize>> = vec![Vec::new(); d];
    for (x, p) in pairs.iter().enumerate() {
        order[p.i].push(x);
    }
    let mut rank = vec![0usize; pairs.len()];
    for list in &order {
        for (y, &x) in list.iter().enumerate() {
            rank[x] = y;
        }
    }
    let gram = &gram;
    pairs
        .into_par_iter()
        .zip(rank.into_par_iter())
        .try_for_each_init(Vec::new, |local: &mut Vec<u64>, (p, y)| {
            let (ri, rj) = (ctx.cards[p.i], ctx.cards[p.j]);
            let (ki, kj) = (k[p.i], k[p.j]);
            let len = ylist[p.i].len();
            let at = *partner_at[p.i]
                .get(y)
                .ok_or_else(|| internal("missing bitset partner"))?;
            local.clear();
            local.resize(ri * rj, 0);
            for a in 0..ki {
                let g = &gram[gram_off[p.i] + a * len + at..][..kj];
                local[a * rj..a * rj + kj].copy_from_slice(g);
            }
            complete(
                local,
                rj,
                Some(ri - 1),
                Some(rj - 1),
                &ctx.m[p.i],
                &ctx.m[p.j],
            )?;
            add_into(p.table, local);
            Ok(())
        })
}

/// Writes the bitsets of levels `0..k` of `codes` (bit t of word w: row 64 w + t) into `out`,
/// `stride` words per level; words past the codes are zero.
pub(crate) fn build_bitsets(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU supports AVX2 (checked just above).
        unsafe { build_bitsets_avx2(codes, k, stride, out) };
        return;
    }
    build_bitsets_scalar(codes, k, stride, out);
}

fn build_bitsets_scalar(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    out.fill(0);
    for (w, chunk) in codes.chunks(64).enumerate() {
        if k <= 8 {
            for l in 0..k {
                let level = l as u16;
                let mut m = 0u64;
                for (t, &c) in chunk.iter().enumerate() {
                    m |= u64::from(c == level) << t;
                }
                out[l * stride + w] = m;
            }
        } else {
            for (t, &c) in chunk.iter().enumerate() {
                let c = usize::from(c);
                if c < k {
                    out[c * stride + w] |= 1u64 << t;
                }
            }
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn build_bitsets_avx2(codes: &[u16], k: usize, stride: usize, out: &mut [u64]) {
    use std::arch::x86_64::*;
    out.fill(0);
    let groups = codes.chunks_exact(64);
    let tail = groups.remainder();
    let full = codes.len() / 64;
    for (w, g) in groups.enumerate() {
        let p = g.as_ptr().cast::<__m256i>();
        // SAFETY: `g` holds 64 u16 = 128 bytes = four 32-byte vectors; loadu takes any alignment.
        let (c0, c1, c2, c3) = unsafe {
            (
                _mm256_loadu_si256(p),
                _mm256_loadu_si256(p.add(1)),
                _mm256_loadu_si256(p.add(2)),
                _mm256_loadu_si256(p.add(3)),
            )
        };
        for l in 0..k {
            let level = _mm256_set1_epi16(l as i16);
            // packs interleaves the 128-bit lanes; permute 0xD8 puts rows back in order.
            let lo = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
                _mm256_cmpeq_epi16(c0, level),
                _mm256_cmpeq_epi16(c1, level),
            ));
            let hi = _mm256_permute4x64_epi64::<0xD8>(_mm256_packs_epi16(
                _mm256_cmpeq_epi16(c2, level),
                _mm256_cmpeq_epi16(c3, level),
            ));
            let lo = u64::from(_mm256_movemask_epi8(lo) as u32);
            let hi = u64::from(_mm256_movemask_epi8(hi) as u32);
            out[l * stride + w] = lo | (hi << 32);
        }
    }
    for (t, &c) in tail.iter().enumerate() {
        let c = usize::from(c);
        if c < k {
            out[c * stride + full] |= 1u64 << t;
        }
    }
}

/// Adds `popcount(a[x] & b[y])` over the first `words` words into `out[x * b.len() + y]`.
pub(crate) fn inner_counts(
    path: Popcount,
    a: &[&[u64]],
    b: &[&[u64]],
    words: usize,
    out: &mut [u64],
) {
    // A path the CPU lacks falls back to the portable one (this keeps the dispatch sound).
    let path = if path.available() {
        path
    } else {
        Popcount::Portable
    };
    let words = a.iter().chain(b).map(|s| s.len()).fold(words, usize::min);
    let (ka, kb) = (a.len(), b.len());
    let mut a0 = 0;
    while a0 < ka {
        let ta = (ka - a0).min(2);
        let mut b0 = 0;
        while b0 < kb {
            let tb = (kb - b0).min(4);
            let t = Tile {
                path,
                a: &a[a0..a0 + ta],
                b: &b[b0..b0 + tb],
                words,
            };
            let mut res = [[0u64; 4]; 2];
            match (ta, tb) {
                (2, 4) => t.run::<2, 4>(&mut res),
                (2, 3) => t.run::<2, 3>(&mut res),
                (2, 2) => t.run::<2, 2>(&mut res),
                (2, 1) => t.run::<2, 1>(&mut res),
                (1, 4) => t.run::<1, 4>(&mut res),
                (1, 3) => t.run::<1, 3>(&mut res),
                (1, 2) => t.run::<1, 2>(&mut res),
                _ => t.run::<1, 1>(&mut res),
            }
            for (x, r) in res.iter().enumerate().take(ta) {
                for (y, &v) in r.iter().enumerate().take(tb) {
                    out[(a0 + x) * kb + b0 + y] += v;
                }
            }
            b0 += tb;
        }
        a0 += ta;
    }
}

/// One tile of up to 2 x 4 cells.
struct Tile<'s> {
    path: Popcount,
    a: &'s [&'s [u64]],
    b: &'s [&'s [u64]],
    words: usize,
}

impl Tile<'_> {
    fn run<const TA: usize, const TB: usize>(&self, res: &mut [[u64; 4]; 2]) {
        let mut a: [&[u64]; TA] = [&[]; TA];
        for (dst, src) in a.iter_mut().zip(self.a) {
            *dst = &src[..self.words];
        }
        let mut b: [&[u64]; TB] = [&[]; TB];
        for (dst, src) in b.iter_mut().zip(self.b) {
            *dst = &src[..self.words];
        }
        let mut out = [[0u64; TB]; TA];
        match self.path {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `inner_counts` only keeps a path that `available()` confirmed on this CPU.
            Popcount::Avx2 => unsafe { tile_avx2::<TA, TB>(a, b, self.words, &mut out) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: as above, POPCNT was detected.
            Popcount::Popcnt => unsafe { tile_popcnt::<TA, TB>(a, b, self.words, &mut out) },
            _ => tile_scalar::<TA, TB>(a, b, self.words, &mut out),
        }
        for (r, o) in res.iter_mut().zip(&out) {
            r[..TB].copy_from_slice(o);
        }
    }
}

/// The tile with `u64::count_ones`; every slice holds exactly `words` words.
#[inline(always)]
fn tile_scalar<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    let mut acc = [[0u64; TB]; TA];
    for w in 0..words {
        let mut av = [0u64; TA];
        for (v, s) in av.iter_mut().zip(&a) {
            *v = s[w];
        }
        for (y, s) in b.iter().enumerate() {
            let bv = s[w];
            for (x, &v) in av.iter().enumerate() {
                acc[x][y] += u64::from((v & bv).count_ones());
            }
        }
    }
    *out = acc;
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "popcnt")]
fn tile_popcnt<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    tile_scalar::<TA, TB>(a, b, words, out);
}

/// The tile with AVX2: per 256 bits, AND, then the popcount of each nibble by table lookup
/// (`vpshufb`), summed into byte counters that `vpsadbw` widens to u64 every 31 vectors (a byte
/// counter gains at most 8 per vector, so 31 x 8 = 248 < 256 cannot overflow).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
fn tile_avx2<const TA: usize, const TB: usize>(
    a: [&[u64]; TA],
    b: [&[u64]; TB],
    words: usize,
    out: &mut [[u64; TB]; TA],
) {
    use std::arch::x86_64::*;
    let lut = _mm256_setr_epi8(
        0, 1, 1, 2, 1, 2, 2, 3, 1, 2, 2, 3, 2, 3, 3, 4, 0, 1, 1, 2, 1, 2, 2, 3, 1, 2, 2, 3, 2, 3,
        3, 4,
    );
    let low = _mm256_set1_epi8(0x0f);
    let zero = _mm256_setzero_si256();
    let vecs = words / 4;
    let mut total = [[zero; TB]; TA];
    let mut v = 0;
    while v < vecs {
        let end = (v + 31).min(vecs);
        let mut acc = [[zero; TB]; TA];
        while v < end {
            let mut av = [zero; TA];
            for (x, s) in av.iter_mut().zip(&a) {
                // SAFETY: v < words / 4 and every slice holds `words` words, so the 4 words
                // at 4 v are in bounds; loadu takes any alignment.
                *x = unsafe { _mm256_loadu_si256(s.as_ptr().add(4 * v).cast()) };
            }
            for (y, s) in b.iter().enumerate() {
                // SAFETY: as above.
                let bv = unsafe { _mm256_loadu_si256(s.as_ptr().add(4 * v).cast()) };
                for (x, &va) in av.iter().enumerate() {
                    let both = _mm256_and_si256(va, bv);
                    let lo = _mm256_and_si256(both, low);
                    let hi = _mm256_and_si256(_mm256_srli_epi16::<4>(both), low);
                    let cnt =
                        _mm256_add_epi8(_mm256_shuffle_epi8(lut, lo), _mm256_shuffle_epi8(lut, hi));
                    acc[x][y] = _mm256_add_epi8(acc[x][y], cnt);
                }
            }
            v += 1;
        }
        for (t, c) in total.iter_mut().zip(&acc) {
            for (tv, &cv) in t.iter_mut().zip(c) {
                *tv = _mm256_add_epi64(*tv, _mm256_sad_epu8(cv, zero));
            }
        }
    }
    for (o, t) in out.iter_mut().zip(&total) {
        for (ov, &tv) in o.iter_mut().zip(t) {
            let lanes = [
                _mm256_extract_epi64::<0>(tv),
                _mm256_extract_epi64::<1>(tv),
                _mm256_extract_epi64::<2>(tv),
                _mm256_extract_epi64::<3>(tv),
            ];
            *ov = lanes.iter().map(|&x| x as u64).sum();
        }
    }
    // The last words that do not fill a vector.
    for w in vecs * 4..words {
        for (x, sa) in a.iter().enumerate() {
            for (y, sb) in b.iter().enumerate() {
                out[x][y] += u64::from((sa[w] & sb[w]).count_ones());
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::rng::Rng;
    use crate::stats::PairStats;

    type TestResult = std::result::Result<(), Box<dyn std::error::Error>>;

    /// `n` codes below `r`: uniform, or at level `dom` except with probability `p_other`.
    fn column(rng: &mut Rng, n: usize, r: usize, dom: Option<(u16, f64)>) -> Vec<u16> {
        (0..n)
            .map(|_| match dom {
                Some((level, p_other)) if rng.next_f64() >= p_other => level,
                _ => (rng.next_u64() % r as u64) as u16,
            })
            .collect()
    }

    fn random_table(
        seed: u64,
        n: usize,
        cards: &[usize],
        sparse_share: f64,
    ) -> (Vec<Vec<u16>>, Vec<usize>) {
        let mut rng = Rng::new(seed, 0);
        let codes = cards
            .iter()
            .map(|&r| {
                let dom = (rng.next_f64() < sparse_share).then(|| {
                    (
                        (rng.next_u64() % r as u64) as u16,
                        0.002 + 0.05 * rng.next_f64(),
                    )
                });
                column(&mut rng, n, r, dom)
            })
            .collect();
        (codes, cards.to_vec())
    }

    /// Every pair's table by the definition.
    fn definition(codes: &[Vec<u16>], cards: &[usize]) -> Vec<Vec<u64>> {
        let d = cards.len();
        let mut out = Vec::new();
        for i in 0..d {
            for j in i + 1..d {
                let mut t = vec![0u64; cards[i] * cards[j]];
                for (&a, &b) in codes[i].iter().zip(&codes[j]) {
                    t[usize::from(a) * cards[j] + usize::from(b)] += 1;
                }
                out.push(t);
            }
        }
        out
    }

    /// Tables counted with one method for every pair (or the auto plan when `method` is None).
    fn counted(
        codes: &[Vec<u16>],
        cards: &[usize],
        method: Option<Method>,
        path: Popcount,
    ) -> Result<Vec<Vec<u64>>> {
        let cols: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
        let n = cols.first().map_or(0, |c| c.len());
        let m = marginals(&cols, cards)?;
        let mut plan = plan(Kernel::Auto, n, cards, &m, path);
        if let Some(method) = method {
            plan.methods.iter_mut().for_each(|x| *x = method);
        }
        let d = cards.len();
        let mut tables: Vec<Vec<u64>> = Vec::new();
        for i in 0..d {
            for j in i + 1..d {
                tables.push(vec![0; cards[i] * cards[j]]);
            }
        }
        let mut views: Vec<&mut [u64]> = tables.iter_mut().map(Vec::as_mut_slice).collect();
        count_chunk(&cols, cards, &m, &plan, path, &mut views)?;
        Ok(tables)
    }

    const METHODS: [Method; 6] = [
        Method::Naive,
        Method::Histogram,
        Method::Bitset,
        Method::LookupFirst,
        Method::LookupSecond,
        Method::Cooc,
    ];

    fn check_all(codes: &[Vec<u16>], cards: &[usize]) -> TestResult {
        let want = definition(codes, cards);
        for path in Popcount::all_available() {
            for method in METHODS {
                let got = counted(codes, cards, Some(method), path)?;
                assert_eq!(got, want, "{method:?} with {path:?} on cards {cards:?}");
            }
            assert_eq!(counted(codes, cards, None, path)?, want, "auto, {path:?}");
        }
        Ok(())
    }

    #[test]
    fn every_kernel_matches_the_definition_on_random_codes() -> TestResult {
        let shapes: [(usize, &[usize]); 6] = [
            (1000, &[2, 3, 5, 10, 2, 7]),
            (777, &[4, 1, 9, 16, 2]),
            (4099, &[2, 2, 2, 2, 2, 2, 2, 2, 2]),
            (300, &[40, 3, 300, 17]),
            (65, &[6, 5, 8]),
            (2048, &[11, 12, 13, 2, 64]),
        ];
        for (seed, (n, cards)) in shapes.iter().enumerate() {
            for share in [0.0, 0.6, 1.0] {
                let (codes, cards) = random_table(seed as u64, *n, cards, share);
                check_all(&codes, &cards)?;
            }
        }
        Ok(())
    }

    #[test]
    fn edge_cases_match_the_definition() -> TestResult {
        // One row; a single column; constant columns; empty batch; n around multiples of 64.
        for n in [0usize, 1, 2, 63, 64, 65, 127, 511, 512, 513] {
            for cards in [&[1usize, 1][..], &[1, 4, 1], &[3, 2], &[2, 9, 1, 5]] {
                let (codes, cards) = random_table(n as u64, n, cards, 0.5);
                check_all(&codes, &cards)?;
            }
        }
        let (codes, cards) = random_table(9, 100, &[5], 0.0);
        check_all(&codes, &cards)?;
        Ok(())
    }

    #[test]
    fn blocks_of_rows_add_up_exactly() -> TestResult {
        // More rows than one bitset block (32,768) and one histogram block (65,536).
        let (codes, cards) = random_table(11, 70_001, &[2, 5, 9, 3, 33], 0.4);
        check_all(&codes, &cards)
    }

    #[test]
    fn sparse_wide_data_uses_cooccurrence_and_matches() -> TestResult {
        // Clickstream-like flags: 200 binary columns, at most 3 ones per row.
        let mut rng = Rng::new(5, 1);
        let (n, d) = (5000, 200);
        let mut codes = vec![vec![0u16; n]; d];
        let mut flag = |row: usize, rng: &mut Rng| {
            let col = (rng.next_u64() % d as u64) as usize;
            codes[col][row] = 1;
        };
        for row in 0..n {
            for _ in 0..(rng.next_u64() % 4) {
                flag(row, &mut rng);
            }
        }
        let cards = vec![2; d];
        let cols: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
        let m = marginals(&cols, &cards)?;
        let plan = plan(Kernel::Auto, n, &cards, &m, Popcount::detect());
        assert!(plan.methods.iter().all(|&x| x == Method::Cooc));
        assert_eq!(
            counted(&codes, &cards, None, Popcount::detect())?,
            definition(&codes, &cards)
        );
        Ok(())
    }

    #[test]
    fn popcount_paths_agree() {
        let mut rng = Rng::new(3, 3);
        for words in [0usize, 1, 3, 4, 5, 8, 31 * 4, 31 * 4 + 3, 200] {
            let rows: Vec<Vec<u64>> = (0..7)
                .map(|_| (0..words).map(|_| rng.next_u64()).collect())
                .collect();
            let a: Vec<&[u64]> = rows[..3].iter().map(Vec::as_slice).collect();
            let b: Vec<&[u64]> = rows[3..].iter().map(Vec::as_slice).collect();
            let mut want = vec![0u64; 12];
            for (x, ra) in a.iter().enumerate() {
                for (y, rb) in b.iter().enumerate() {
                    want[x * 4 + y] = ra
                        .iter()
                        .zip(*rb)
                        .map(|(p, q)| (p & q).count_ones() as u64)
                        .sum();
                }
            }
            for path in Popcount::all_available() {
                let mut got = vec![0u64; 12];
                inner_counts(path, &a, &b, words, &mut got);
                assert_eq!(got, want, "{path:?}, {words} words");
            }
        }
        assert!(Popcount::Portable.available());
        assert!(Popcount::all_available().contains(&Popcount::detect()));
    }

    #[test]
    fn bitsets_are_built_the_same_on_every_path() {
        let mut rng = Rng::new(8, 0);
        for (n, r) in [(0usize, 3usize), (1, 2), (64, 5), (200, 9), (130, 40)] {
            let codes = column(&mut rng, n, r, None);
            let k = r - 1;
            let stride = n.div_ceil(64).div_ceil(8).max(1) * 8;
            let mut got = vec![u64::MAX; k * stride];
            build_bitsets(&codes, k, stride, &mut got);
            let mut want = vec![u64::MAX; k * stride];
            build_bitsets_scalar(&codes, k, stride, &mut want);
            assert_eq!(got, want);
            for (row, &c) in codes.iter().enumerate() {
                for l in 0..k {
                    let bit = (want[l * stride + row / 64] >> (row % 64)) & 1;
                    assert_eq!(bit == 1, usize::from(c) == l);
                }
            }
        }
    }

    #[test]
    fn nondominant_rows_are_found_on_every_path() {
        let mut rng = Rng::new(6, 0);
        for n in [0usize, 1, 31, 32, 33, 1000] {
            let col = column(&mut rng, n, 4, Some((2, 0.1)));
            let want: Vec<(usize, u16)> = col
                .iter()
                .enumerate()
                .filter(|(_, &c)| c != 2)
                .map(|(r, &c)| (r, c))
                .collect();
            let mut got = Vec::new();
            for_each_nondominant(&col, 2, |r, c| got.push((r, c)));
            assert_eq!(got, want);
            got.clear();
            nondominant_scalar(&col, 2, &mut |r, c| got.push((r, c)));
            assert_eq!(got, want);
        }
    }

    #[test]
    fn marginals_count_every_code() {
        let mut rng = Rng::new(4, 0);
        for r in [1usize, 2, 5, 8, 9, 100] {
            let codes = column(&mut rng, 70_001, r, None);
            let mut want = vec![0u64; r];
            codes.iter().for_each(|&c| want[usize::from(c)] += 1);
            assert_eq!(marginal(&codes, r), Some(want.clone()));
            assert_eq!(marginal_body(&codes, r), Some(want));
            let mut bad = codes.clone();
            bad[69_000] = r as u16;
            assert_eq!(marginal(&bad, r), None);
            assert_eq!(marginal_body(&bad, r), None);
        }
    }

    #[test]
    fn kernel_names_parse_and_unknown_names_are_refused() {
        for (name, kernel) in Kernel::NAMES.iter().zip([
            Kernel::Auto,
            Kernel::Bitset,
            Kernel::Histogram,
            Kernel::Sparse,
            Kernel::Naive,
        ]) {
            assert_eq!(Kernel::parse(name).ok(), Some(kernel));
            assert_eq!(Kernel::parse(&name.to_uppercase()).ok(), Some(kernel));
        }
        assert_eq!(Kernel::parse("").ok(), Some(Kernel::Auto));
        let err = Kernel::parse("fast").err().map(|e| e.to_string());
        assert!(err.is_some_and(|e| e.contains("TREEWISE_KERNEL") && e.contains("bitset")));
    }

    #[test]
    fn thread_counts_and_batch_splits_give_the_same_stats() -> TestResult {
        let (codes, cards) = random_table(21, 4_000, &[2, 7, 3, 12, 50, 2, 4], 0.5);
        let whole = {
            let mut s = PairStats::new(cards.clone())?;
            s.add_codes(&codes)?;
            s
        };
        for threads in [1, 3] {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()?;
            for split in [7usize, 1000, 3_999] {
                let mut s = PairStats::new(cards.clone())?;
                let mut start = 0;
                while start < 4_000 {
                    let end = (start + split).min(4_000);
                    let part: Vec<Vec<u16>> =
                        codes.iter().map(|c| c[start..end].to_vec()).collect();
                    pool.install(|| s.add_codes(&part))?;
                    start = end;
                }
                assert_eq!(s, whole, "{threads} threads, batches of {split}");
            }
        }
        for kernel in [
            Kernel::Bitset,
            Kernel::Histogram,
            Kernel::Sparse,
            Kernel::Naive,
        ] {
            let cols: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
            let mut m: Vec<Vec<u64>> = cards.iter().map(|&r| vec![0; r]).collect();
            let mut tables: Vec<Vec<u64>> = definition(&codes, &cards)
                .iter()
                .map(|t| vec![0; t.len()])
                .collect();
            let mut views: Vec<&mut [u64]> = tables.iter_mut().map(Vec::as_mut_slice).collect();
            count(&cols, &cards, &mut m, &mut views, kernel)?;
            assert_eq!(m, whole.marginals());
            assert_eq!(tables, definition(&codes, &cards), "{kernel:?}");
        }
        Ok(())
    }
}
