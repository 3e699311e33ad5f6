//! Tests of the counting kernels: every kernel and SIMD path against the definition.

use super::bitset::{build_bitsets, build_bitsets_scalar};
use super::popcount::inner_counts;
use super::walk::{for_each_nondominant, nondominant_scalar};
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
                let part: Vec<Vec<u16>> = codes.iter().map(|c| c[start..end].to_vec()).collect();
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
