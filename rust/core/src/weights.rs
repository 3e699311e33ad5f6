//! Edge weights from exact counts: mutual information (nats), the G statistic, its degrees of
//! freedom and its chi-square p-value.

use rayon::prelude::*;

use crate::stats::{pairs, PairStats};

/// What one pair of columns says about each other.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PairWeight {
    /// Mutual information in nats.
    pub mutual_info: f64,
    /// The G statistic of independence, 2·N·MI.
    pub g_statistic: f64,
    /// (r_i' − 1)(r_j' − 1), counting only the codes that occur.
    pub dof: u64,
    /// P(chi2(dof) ≥ G); 1.0 when dof is 0.
    pub p_value: f64,
}

impl PairWeight {
    /// The weight of a pair with mutual information `mi` (nats) over `n` rows, where
    /// `occurring_a` and `occurring_b` codes of the two columns occur: G = 2·N·MI with
    /// (r_a' − 1)(r_b' − 1) degrees of freedom.
    pub fn new(mi: f64, n: u64, occurring_a: u64, occurring_b: u64) -> Self {
        let dof = occurring_a.saturating_sub(1) * occurring_b.saturating_sub(1);
        let g = 2.0 * n as f64 * mi;
        PairWeight {
            mutual_info: mi,
            g_statistic: g,
            dof,
            p_value: chi2_sf(g, dof),
        }
    }
}

/// A count in a contingency table: exact (`u64`) or weighted by responsibilities (`f64`, in a
/// mixture's M-step). Both give the same bits for the same integer values below 2^53.
pub trait Count: Copy {
    /// The count as a float.
    fn value(self) -> f64;
}

impl Count for u64 {
    #[inline]
    fn value(self) -> f64 {
        self as f64
    }
}

impl Count for f64 {
    #[inline]
    fn value(self) -> f64 {
        self
    }
}

/// Mutual information of a row-major `ra x rb` table with marginals `ma`, `mb` over `n` rows.
///
/// Each cell gives the term `(c/n)·ln(c·n / (ma·mb))`. The terms are sorted and summed in that
/// order, so the sum depends only on the multiset of terms: a transposed or permuted table gives
/// the same bits, and so does the numpy reference, which follows the same recipe.
pub fn mutual_info<T: Count>(table: &[T], ma: &[T], mb: &[T], n: T) -> f64 {
    let rb = mb.len();
    let nf = n.value();
    let mut terms: Vec<f64> = Vec::new();
    for (a, &na) in ma.iter().enumerate() {
        for (b, &nb) in mb.iter().enumerate() {
            let cf = table[a * rb + b].value();
            if cf > 0.0 {
                let (top, bottom) = (cf * nf, na.value() * nb.value());
                // Weighted counts (a mixture's responsibilities) can be so small that a product
                // leaves the normal range and the ratio goes to 0 or infinity: take logs then.
                // Integer counts always stay in range and keep the product form.
                let log_ratio = if top.is_normal() && bottom.is_normal() {
                    (top / bottom).ln()
                } else {
                    cf.ln() + nf.ln() - na.value().ln() - nb.value().ln()
                };
                terms.push((cf / nf) * log_ratio);
            }
        }
    }
    terms.sort_unstable_by(f64::total_cmp);
    let total: f64 = terms.iter().fold(0.0, |acc, t| acc + t);
    total.max(0.0)
}

/// The weight of pair (i, j), i < j.
pub fn pair_weight(stats: &PairStats, i: usize, j: usize) -> PairWeight {
    let (ma, mb) = (stats.marginal(i), stats.marginal(j));
    let n = stats.n_rows();
    let mi = mutual_info(stats.table(i, j), ma, mb, n);
    let occurring = |m: &[u64]| m.iter().filter(|c| **c > 0).count() as u64;
    PairWeight::new(mi, n, occurring(ma), occurring(mb))
}

/// The weights of every pair, in pair-index order.
pub fn all_weights(stats: &PairStats) -> Vec<PairWeight> {
    pairs(stats.n_columns())
        .into_par_iter()
        .map(|(i, j)| pair_weight(stats, i, j))
        .collect()
}

/// P(X ≥ x) for X ~ chi-square with `dof` degrees of freedom; 1.0 for `dof == 0`.
pub fn chi2_sf(x: f64, dof: u64) -> f64 {
    if dof == 0 || x.is_nan() {
        return 1.0;
    }
    gamma_q(dof as f64 / 2.0, x / 2.0)
}

/// ln Γ(x) for x > 0, by the Lanczos approximation (C. Lanczos, "A precision approximation of
/// the gamma function", J. SIAM Numer. Anal. Ser. B 1 (1964) 86-96) with g = 7 and nine terms.
/// The coefficients are P. Godfrey's set (2001) as published in the GNU Scientific Library,
/// specfunc/gamma.c, `lanczos_7_c` (each constant below is that value rounded to f64); not the
/// Numerical Recipes set, which has g = 5. Checked against scipy in the tests.
pub fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        // Reflection: Γ(x)Γ(1−x) = π / sin(πx).
        let pi = std::f64::consts::PI;
        return (pi / (pi * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut sum = C[0];
    for (k, c) in C.iter().enumerate().skip(1) {
        sum += c / (x + k as f64);
    }
    let t = x + G + 0.5;
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + sum.ln()
}

/// The regularized upper incomplete gamma function Q(a, x), by the power series of P below
/// x < a + 1 and by its continued fraction (evaluated with the modified-ratio method) above it.
pub fn gamma_q(a: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    if x.is_infinite() {
        return 0.0;
    }
    let log_prefactor = -x + a * x.ln() - ln_gamma(a);
    if x < a + 1.0 {
        let mut term = 1.0 / a;
        let mut sum = term;
        let mut ap = a;
        for _ in 0..100_000 {
            ap += 1.0;
            term *= x / ap;
            sum += term;
            if term.abs() < sum.abs() * 1e-17 {
                break;
            }
        }
        (1.0 - sum * log_prefactor.exp()).clamp(0.0, 1.0)
    } else {
        let tiny = 1e-300;
        let mut b = x + 1.0 - a;
        let mut c = 1.0 / tiny;
        let mut d = 1.0 / b;
        let mut h = d;
        for i in 1..100_000 {
            let an = -(i as f64) * (i as f64 - a);
            b += 2.0;
            d = an * d + b;
            if d.abs() < tiny {
                d = tiny;
            }
            c = b + an / c;
            if c.abs() < tiny {
                c = tiny;
            }
            d = 1.0 / d;
            let delta = d * c;
            h *= delta;
            if (delta - 1.0).abs() < 1e-16 {
                break;
            }
        }
        (log_prefactor.exp() * h).clamp(0.0, 1.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn independent_table_has_zero_information() {
        // Outer product of marginals (2, 2) x (3, 1): cells are exact, so MI is exactly 0.
        let t = [6, 2, 6, 2];
        assert_eq!(mutual_info(&t, &[8, 8], &[12, 4], 16), 0.0);
    }

    #[test]
    fn tiny_weighted_counts_keep_their_information() {
        // Mutual information does not depend on the scale of the counts (it is a function of
        // the proportions), so counts scaled down to the subnormal range must give the same
        // figure, not an infinite one from a product that underflows to 0.
        let t = [3.0, 1.0, 1.0, 5.0];
        let (ma, mb, n) = ([4.0, 6.0], [4.0, 6.0], 10.0);
        let full = mutual_info(&t, &ma, &mb, n);
        for scale in [1e-160, 1e-300, 1e-310] {
            let s = |v: &[f64]| v.iter().map(|x| x * scale).collect::<Vec<_>>();
            let tiny = mutual_info(&s(&t), &s(&ma), &s(&mb), n * scale);
            assert!(
                tiny.is_finite() && (tiny - full).abs() < 1e-9 * full,
                "{scale}: {tiny}"
            );
        }
    }

    #[test]
    fn copy_of_a_fair_bit_has_ln2() {
        let t = [5, 0, 0, 5];
        let mi = mutual_info(&t, &[5, 5], &[5, 5], 10);
        assert!((mi - std::f64::consts::LN_2).abs() < 1e-15);
    }

    #[test]
    fn g_dof_and_p_value_follow_the_g_test() -> crate::Result<()> {
        // Column b has 4 codes, of which code 3 never occurs.
        let a: Vec<u16> = vec![0, 0, 0, 0, 1, 1, 1, 1, 1, 1];
        let b: Vec<u16> = vec![0, 0, 1, 2, 0, 1, 1, 2, 2, 2];
        let mut stats = PairStats::new(vec![2, 4])?;
        stats.add_codes(&[a.clone(), b.clone()])?;
        let w = pair_weight(&stats, 0, 1);
        // The G-test of independence (textbook definition, from memory): G = 2 Σ O ln(O / E)
        // with E = row total x column total / N, and (r − 1)(c − 1) degrees of freedom over
        // the levels that occur: (2 − 1)(3 − 1) = 2.
        let (rows, cols) = ([4.0, 6.0], [3.0, 3.0, 4.0]);
        let mut g = 0.0;
        for (x, row) in rows.iter().enumerate() {
            for (y, col) in cols.iter().enumerate() {
                let o = a
                    .iter()
                    .zip(&b)
                    .filter(|(p, q)| **p == x as u16 && **q == y as u16);
                let o = o.count() as f64;
                if o > 0.0 {
                    g += 2.0 * o * (o / (row * col / 10.0)).ln();
                }
            }
        }
        assert_eq!(w.dof, 2);
        assert!(
            (w.g_statistic - g).abs() < 1e-12,
            "{} vs {g}",
            w.g_statistic
        );
        // Chi-square with 2 dof: P(X >= x) = exp(-x/2) (a textbook identity).
        assert!((w.p_value - (-g / 2.0).exp()).abs() < 1e-14);
        assert_eq!(PairWeight::new(w.mutual_info, 10, 2, 3), w);
        Ok(())
    }

    #[test]
    fn chi2_survival_known_points() {
        // chi2 with 2 dof is exponential with mean 2: P(X >= x) = exp(-x/2) (a textbook identity).
        for x in [0.1, 1.0, 5.0, 40.0] {
            assert!((chi2_sf(x, 2) - (-x / 2.0f64).exp()).abs() < 1e-14);
        }
        // Γ(5) = 4! = 24.
        assert!((ln_gamma(5.0) - 24f64.ln()).abs() < 1e-13);
    }
}
