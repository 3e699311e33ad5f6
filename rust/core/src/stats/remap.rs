//! Recoding counted statistics: a table over finer codes becomes the table over coarser ones by
//! summing its rows and columns, so counts taken with provisional codes are exact after recoding.

use rayon::prelude::*;

use super::{pair_index, pairs, PairStats};
use crate::error::{Error, Result};

impl PairStats {
    /// These counts recoded: column `keep[k].0` becomes column k, its code `a` becomes
    /// `keep[k].1[a]`, and the new columns have `cards` codes. Codes that map to one code add up,
    /// so the result is exactly what counting the recoded data would give. Growing a column
    /// (an identity map into more codes) is a recoding too.
    pub fn recode(&self, keep: &[(usize, Vec<u16>)], cards: Vec<usize>) -> Result<PairStats> {
        let d = self.cards.len();
        if keep.len() != cards.len() {
            return Err(Error::Invalid(format!(
                "{} recoded columns for {} cardinalities",
                keep.len(),
                cards.len()
            )));
        }
        for ((old, map), &r) in keep.iter().zip(&cards) {
            let fits = *old < d
                && map.len() == self.cards[*old]
                && map.iter().all(|c| usize::from(*c) < r);
            if !fits {
                return Err(Error::Invalid(format!(
                    "column {old} cannot be recoded into {r} codes with this map"
                )));
            }
        }
        let mut out = PairStats::new(cards)?;
        out.n_rows = self.n_rows;
        for (k, (old, map)) in keep.iter().enumerate() {
            for (a, c) in self.marginals[*old].iter().enumerate() {
                out.marginals[k][usize::from(map[a])] += c;
            }
        }
        let new_pairs = pairs(keep.len());
        let mut tables: Vec<&mut [u64]> = Vec::with_capacity(new_pairs.len());
        let mut rest: &mut [u64] = &mut out.cells;
        for w in out.offsets.windows(2) {
            let (head, tail) = std::mem::take(&mut rest).split_at_mut(w[1] - w[0]);
            tables.push(head);
            rest = tail;
        }
        let new_cards = &out.cards;
        tables
            .par_iter_mut()
            .zip(new_pairs.par_iter())
            .for_each(|(dst, &(ni, nj))| {
                let ((oi, mi), (oj, mj)) = (&keep[ni], &keep[nj]);
                let rj_new = new_cards[nj];
                // The old table is stored with the lower column index first.
                let (lo, hi) = if oi < oj { (*oi, *oj) } else { (*oj, *oi) };
                let p = pair_index(d, lo, hi);
                let src = &self.cells[self.offsets[p]..self.offsets[p + 1]];
                let r_hi = self.cards[hi];
                for (a, row) in src.chunks_exact(r_hi.max(1)).enumerate() {
                    for (b, &c) in row.iter().enumerate() {
                        if c == 0 {
                            continue;
                        }
                        let (x, y) = if oi < oj { (a, b) } else { (b, a) };
                        dst[usize::from(mi[x]) * rj_new + usize::from(mj[y])] += c;
                    }
                }
            });
        Ok(out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recoding_equals_counting_the_recoded_codes() -> Result<()> {
        // Three columns with 4, 3 and 5 provisional codes; merge codes, reorder, drop one.
        let codes = vec![
            vec![0u16, 1, 2, 3, 3, 1, 0, 2, 2],
            vec![2u16, 1, 0, 0, 2, 1, 1, 0, 2],
            vec![4u16, 3, 2, 1, 0, 0, 1, 2, 4],
        ];
        let mut fine = PairStats::new(vec![4, 3, 5])?;
        fine.add_codes(&codes)?;
        let map0 = vec![1u16, 0, 1, 2];
        let map2 = vec![0u16, 0, 1, 1, 1];
        // Column 2 first, then column 0; column 1 is dropped.
        let coarse = fine.recode(&[(2, map2.clone()), (0, map0.clone())], vec![2, 3])?;
        let recoded = vec![
            codes[2].iter().map(|c| map2[usize::from(*c)]).collect(),
            codes[0]
                .iter()
                .map(|c| map0[usize::from(*c)])
                .collect::<Vec<u16>>(),
        ];
        let mut direct = PairStats::new(vec![2, 3])?;
        direct.add_codes(&recoded)?;
        assert_eq!(coarse, direct);
        // Growing is recoding with the identity into more codes.
        let grown = fine.recode(
            &[
                (0, vec![0, 1, 2, 3]),
                (1, vec![0, 1, 2]),
                (2, vec![0, 1, 2, 3, 4]),
            ],
            vec![6, 3, 5],
        )?;
        assert_eq!(grown.table(0, 2)[..5], fine.table(0, 2)[..5]);
        assert_eq!(grown.marginal(0)[4..], [0, 0]);
        assert!(fine.recode(&[(0, vec![0, 1, 2, 9])], vec![4]).is_err());
        Ok(())
    }
}
