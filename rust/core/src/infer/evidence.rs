//! Evidence: a batch of rows encoded with the model's codebook, nulls and unseen values marked
//! as unobserved.

use arrow_array::{Array, RecordBatch};
use rayon::prelude::*;

use super::{Evidence, Inference, MISSING};
use crate::codebook::{Codebook, ColumnCode, UNSEEN};
use crate::error::Result;

/// How one column's evidence is encoded: with a code that marks nulls, or (for a column whose
/// codes are full) with the model's own encoder and the array's null mask.
#[derive(Clone, Debug)]
pub(super) enum Encoder {
    WithNull(ColumnCode, u16),
    Plain(ColumnCode),
}

/// Each column's evidence encoder: its own code if it has a null code, else the same code with
/// one added (or, when the codes are full, the plain code and the array's null mask).
pub(super) fn encoders(codebook: &Codebook) -> Vec<Encoder> {
    codebook
        .columns()
        .iter()
        .map(|col| match col.null_code() {
            Some(null) => Encoder::WithNull(col.clone(), null),
            None => {
                let with_null = col.with_null();
                match with_null.ok().and_then(|w| w.null_code().map(|n| (w, n))) {
                    Some((w, n)) => Encoder::WithNull(w, n),
                    None => Encoder::Plain(col.clone()),
                }
            }
        })
        .collect()
}

impl Inference {
    /// Encodes a batch with the model's columns (in order) as evidence. A null (or NaN) is
    /// unobserved, even in a column whose codebook has a null code; a value without a code is
    /// unobserved too, and counted in [`Evidence::unseen`].
    pub fn evidence(&self, batch: &RecordBatch) -> Result<Evidence> {
        self.model.codebook().check_batch(batch)?;
        let batch = &crate::times::conform_times(batch, self.model.dtypes())?;
        let n = batch.num_rows();
        let columns: Vec<(Vec<u16>, Vec<bool>, u64)> = self
            .encoders
            .par_iter()
            .zip(batch.columns().par_iter())
            .map(|(encoder, array)| {
                let mut raw = Vec::with_capacity(n);
                let mut null = vec![false; n];
                let mut unseen = 0u64;
                match encoder {
                    Encoder::WithNull(code, null_code) => {
                        code.encode(array.as_ref(), false, &mut raw)?;
                        for (r, is_null) in raw.iter_mut().zip(null.iter_mut()) {
                            if *r == *null_code {
                                *is_null = true;
                                *r = MISSING;
                            } else if *r == UNSEEN {
                                unseen += 1;
                            }
                        }
                    }
                    Encoder::Plain(code) => {
                        code.encode(array.as_ref(), false, &mut raw)?;
                        let nulls = array.logical_nulls();
                        for (i, r) in raw.iter().enumerate() {
                            if nulls.as_ref().is_some_and(|m| m.is_null(i)) {
                                null[i] = true;
                            } else if *r == UNSEEN {
                                unseen += 1;
                            }
                        }
                    }
                }
                Ok((raw, null, unseen))
            })
            .collect::<Result<_>>()?;
        let mut codes = Vec::with_capacity(columns.len());
        let mut nulls = Vec::with_capacity(columns.len());
        let mut unseen = Vec::with_capacity(columns.len());
        for (c, n, u) in columns {
            codes.push(c);
            nulls.push(n);
            unseen.push(u);
        }
        Ok(Evidence {
            n_rows: n,
            codes,
            null: nulls,
            unseen,
        })
    }
}
