//! What a column's values look like inside one code: the tail of rare values behind "other", and
//! the observed distribution inside each numeric bin, so that sampling gives back real values.

use crate::codebook::Values;

/// The most rare values a column keeps behind its "other" code (with their counts). The index of a
/// tail value must stay below `u16::MAX`, which marks "not in the tail".
pub const TAIL_LIMIT: usize = 1 << 15;
/// A bin with at most this many distinct values keeps them all, with their counts.
pub const ATOMS: usize = 128;
/// A bin with more distinct values keeps this many equal-mass steps (QUANTILES + 1 points).
pub const QUANTILES: usize = 64;

/// The values behind a column's "other" code, most frequent first up to [`TAIL_LIMIT`], stored
/// sorted by value with their counts; `rest_values` further values in `rest_rows` rows did not fit.
#[derive(Clone, Debug, PartialEq)]
pub struct Tail {
    pub values: Values,
    pub counts: Vec<u64>,
    pub rest_values: u64,
    pub rest_rows: u64,
}

impl Tail {
    /// Rows behind the "other" code (None if the counts overflow: a damaged file).
    pub fn checked_rows(&self) -> Option<u64> {
        checked_total(&self.counts)?.checked_add(self.rest_rows)
    }

    /// Rows behind the "other" code (saturating; a codebook checks `checked_rows` on build).
    pub fn rows(&self) -> u64 {
        self.checked_rows().unwrap_or(u64::MAX)
    }

    /// Distinct values behind the "other" code.
    pub fn n_values(&self) -> u64 {
        (self.counts.len() as u64).saturating_add(self.rest_values)
    }

    /// ln P(value | other) for each tail entry, then for a value outside the table, with
    /// Dirichlet smoothing `alpha` over the distinct values plus one slot for values never seen.
    pub fn log_probs(&self, alpha: f64) -> (Vec<f64>, f64) {
        let denom = self.rows() as f64 + alpha * self.n_values().saturating_add(1) as f64;
        if denom <= 0.0 {
            let uniform = -((self.n_values().max(1)) as f64).ln();
            return (vec![uniform; self.counts.len()], uniform);
        }
        let table = self
            .counts
            .iter()
            .map(|&c| ((c as f64 + alpha) / denom).ln())
            .collect();
        // A value outside the table is one of the rest (of average count) or never seen.
        let outside = if self.rest_values > 0 {
            self.rest_rows as f64 / self.rest_values as f64 + alpha
        } else {
            alpha
        };
        (table, (outside / denom).ln())
    }

    /// Cumulative shares of the table's entries, for drawing one (+inf from the last on).
    pub fn cdf(&self) -> Vec<f64> {
        cumulative(&self.counts)
    }
}

/// The sum of `counts`, or None if it overflows (only a damaged file can make it).
pub fn checked_total(counts: &[u64]) -> Option<u64> {
    counts.iter().try_fold(0u64, |a, c| a.checked_add(*c))
}

/// Cumulative shares of `counts`; the last entry with a count and those after it are +inf, so
/// rounding never runs off the end nor picks an entry of count zero.
pub fn cumulative(counts: &[u64]) -> Vec<f64> {
    let total = counts.iter().map(|c| *c as f64).sum::<f64>().max(1.0);
    let mut acc = 0.0;
    let mut out: Vec<f64> = counts
        .iter()
        .map(|&c| {
            acc += c as f64;
            acc / total
        })
        .collect();
    if let Some(last) = counts.iter().rposition(|c| *c > 0) {
        out[last..].iter_mut().for_each(|c| *c = f64::INFINITY);
    }
    out
}

/// The index picked by a uniform draw `u` in [0, 1) from cumulative shares.
pub fn pick(cdf: &[f64], u: f64) -> usize {
    cdf.partition_point(|c| *c <= u)
        .min(cdf.len().saturating_sub(1))
}

/// The observed values inside one numeric bin.
#[derive(Clone, Debug, PartialEq)]
pub enum Within {
    /// Every distinct value of the bin (sorted) with its count.
    Atoms { values: Vec<f64>, counts: Vec<u64> },
    /// The bin's order statistics at QUANTILES + 1 equally spaced ranks (first = its minimum,
    /// last = its maximum); a draw interpolates between neighbours.
    Steps(Vec<f64>),
}

impl Within {
    /// Summarises a bin's sorted (value, count) entries.
    pub fn from_sorted(entries: &[(f64, u64)]) -> Within {
        if entries.len() <= ATOMS {
            return Within::Atoms {
                values: entries.iter().map(|e| e.0).collect(),
                counts: entries.iter().map(|e| e.1).collect(),
            };
        }
        let m: u128 = entries.iter().map(|e| u128::from(e.1)).sum();
        let mut points = Vec::with_capacity(QUANTILES + 1);
        let (mut at, mut before) = (0usize, 0u128);
        for j in 0..=QUANTILES {
            let rank = j as u128 * m.saturating_sub(1) / QUANTILES as u128;
            while at + 1 < entries.len() && before + u128::from(entries[at].1) <= rank {
                before += u128::from(entries[at].1);
                at += 1;
            }
            points.push(entries[at].0);
        }
        Within::Steps(points)
    }

    /// Checks a summary read from a file: finite, sorted, non-empty, inside [lo, hi].
    pub fn is_valid(&self, lo: f64, hi: f64) -> bool {
        let inside = |v: &[f64]| {
            !v.is_empty()
                && v.iter().all(|x| x.is_finite() && lo <= *x && *x <= hi)
                && v.windows(2).all(|w| w[0] <= w[1])
        };
        match self {
            Within::Atoms { values, counts } => {
                inside(values)
                    && values.windows(2).all(|w| w[0] < w[1])
                    && values.len() == counts.len()
                    && checked_total(counts).is_some_and(|t| t > 0)
            }
            Within::Steps(points) => points.len() == QUANTILES + 1 && inside(points),
        }
    }

    /// A value of the bin at uniform draw `u` in [0, 1): an observed value picked by its count,
    /// or an interpolation between neighbouring order statistics (rounded to an integer when
    /// the column holds integers). `u = 0.5` gives the bin's median.
    pub fn value(&self, u: f64, integral: bool) -> f64 {
        match self {
            Within::Atoms { values, counts } => {
                let total = counts.iter().map(|c| *c as f64).sum::<f64>();
                let target = u * total;
                let mut acc = 0.0;
                for (v, c) in values.iter().zip(counts) {
                    acc += *c as f64;
                    if acc > target {
                        return *v;
                    }
                }
                values.last().copied().unwrap_or(f64::NAN)
            }
            Within::Steps(points) => {
                let steps = points.len().saturating_sub(1).max(1);
                let at = (u * steps as f64).clamp(0.0, steps as f64);
                let j = (at.floor() as usize).min(steps - 1).min(points.len() - 1);
                let (a, b) = (points[j], points[(j + 1).min(points.len() - 1)]);
                let v = a + (at - j as f64) * (b - a);
                let v = if integral { v.round() } else { v };
                v.clamp(a.min(b), a.max(b))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bin_with_few_values_gives_them_back_by_count() {
        let w = Within::from_sorted(&[(1.0, 3), (2.0, 1)]);
        assert_eq!(w.value(0.0, false), 1.0);
        assert_eq!(w.value(0.74, false), 1.0);
        assert_eq!(w.value(0.76, false), 2.0);
        assert_eq!(w.value(0.5, false), 1.0); // the median
    }

    #[test]
    fn a_wide_bin_interpolates_between_its_order_statistics() {
        let entries: Vec<(f64, u64)> = (0..1000).map(|k| (k as f64, 1)).collect();
        let Within::Steps(points) = Within::from_sorted(&entries) else {
            panic!("expected steps")
        };
        assert_eq!(points.len(), QUANTILES + 1);
        assert_eq!((points[0], points[QUANTILES]), (0.0, 999.0));
        let w = Within::Steps(points);
        // Order statistic floor(j * 999 / 64) at j = 32 is 499.
        assert_eq!(w.value(0.5, true), 499.0);
        assert!(w.is_valid(0.0, 999.0));
    }

    #[test]
    fn a_tail_with_the_most_distinct_values_has_finite_probabilities() {
        // Fuzz finding tail-distinct-values-overflow: a forged file's tail claimed 2^64 - 1
        // distinct values behind "other"; one more slot for unseen values overflowed.
        let tail = Tail {
            values: Values::Int(vec![7]),
            counts: vec![3],
            rest_values: u64::MAX,
            rest_rows: 5,
        };
        let (table, outside) = tail.log_probs(0.5);
        assert!(table.iter().all(|p| p.is_finite() && *p <= 0.0));
        assert!(outside.is_finite());
    }

    #[test]
    fn a_tail_whose_counts_overflow_is_refused() {
        // Fuzz finding tail-count-overflow: the counts of a forged file summed past 2^64.
        let tail = Tail {
            values: Values::Int(vec![7, 8]),
            counts: vec![u64::MAX, 1],
            rest_values: 0,
            rest_rows: 0,
        };
        assert_eq!(tail.checked_rows(), None);
        let shape = crate::codebook::Shape {
            tail: Some(tail),
            within: Vec::new(),
            integral: false,
        };
        let built = crate::codebook::ColumnCode::build(
            "x".into(),
            crate::values::Kind::Int,
            Values::Int(vec![1]),
            true,
            false,
            shape,
        );
        assert!(built.is_err());
    }

    #[test]
    fn tail_probabilities_sum_to_one_with_the_unseen_slot() {
        let tail = Tail {
            values: Values::Int(vec![7, 8]),
            counts: vec![3, 1],
            rest_values: 0,
            rest_rows: 0,
        };
        let (table, outside) = tail.log_probs(0.5);
        let total: f64 = table.iter().map(|l| l.exp()).sum::<f64>() + outside.exp();
        assert!((total - 1.0).abs() < 1e-12);
        assert_eq!(pick(&tail.cdf(), 0.7), 0);
        assert_eq!(pick(&tail.cdf(), 0.8), 1);
    }
}
