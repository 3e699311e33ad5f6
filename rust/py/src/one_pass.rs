//! The OnePass class: the codebook pass that also counts every pair (see `tally::provisional`).

use pyo3::prelude::*;
use treewise_core::memory;
use treewise_core::tally::OnePass;
use treewise_core::Codebook;

use crate::arrow_import::import_batch;
use crate::codebook::PyCodebook;
use crate::codebook_builder::{learned_parts, parse_kinds, CapTuple, NoteTuple};
use crate::errors::{detached, to_py};
use crate::pair_stats::PyPairStats;
use crate::threads;
use crate::{slices, SLICE_ROWS};

/// The end of a pass: the codebook, the caps, the notes on columns, and the counts `S`.
type Finished<S> = (PyCodebook, Vec<CapTuple>, Vec<NoteTuple>, S);

/// Tallies every batch and counts its pairs with provisional codes, so that a fit reads the
/// data once; `finish` returns the pair statistics too, or None when the pass had to stop
/// counting (`fallback` says why) and a second pass must count.
#[pyclass(name = "OnePass", module = "treewise._core")]
pub(crate) struct PyOnePass {
    inner: Option<OnePass>,
}

#[pymethods]
impl PyOnePass {
    #[new]
    fn new(names: Vec<String>, cell_limit: u64) -> PyResult<Self> {
        let inner = OnePass::new(names, cell_limit).map_err(to_py)?;
        Ok(PyOnePass { inner: Some(inner) })
    }

    /// Tallies and counts one Arrow record batch (any object with `__arrow_c_array__`).
    fn observe(&mut self, py: Python<'_>, batch: &Bound<'_, PyAny>) -> PyResult<()> {
        let batch = import_batch(batch)?;
        let pass = self.inner.as_mut().ok_or_else(finished_error)?;
        for slice in slices(&batch) {
            if let Err(e) = detached(py, || pass.observe(&slice)) {
                // Any error may leave part of the slice counted: the pass is spent.
                self.inner = None;
                return Err(e);
            }
            py.check_signals()?;
        }
        Ok(())
    }

    /// Stop counting once a number or time column not named in `categorical` has more than
    /// `n_bins` distinct values (it will be binned): for data in memory, where a second pass is
    /// cheap.
    fn stop_past_bins(&mut self, n_bins: usize, categorical: Vec<String>) -> PyResult<()> {
        let pass = self.inner.as_mut().ok_or_else(finished_error)?;
        pass.stop_past_bins(n_bins, &categorical);
        Ok(())
    }

    /// Rows observed so far.
    #[getter]
    fn rows(&self) -> u64 {
        self.inner.as_ref().map_or(0, OnePass::rows)
    }

    /// The columns that ran out of provisional codes and are only tallied (a second pass counts
    /// if any of them is modelled in the end).
    #[getter]
    fn uncounted(&self) -> Vec<String> {
        self.inner
            .as_ref()
            .map_or_else(Vec::new, OnePass::uncounted)
    }

    /// Why the pass stopped counting, or None while it still counts.
    #[getter]
    fn fallback(&self) -> Option<String> {
        self.inner
            .as_ref()
            .and_then(|p| p.fallback().map(str::to_string))
    }

    /// Fixes one codebook from the tallies of several passes over the same columns (the two
    /// sides of a comparison) and returns the codebook, the caps, the notes, and each pass's
    /// pair statistics over those codes (None for a pass that stopped counting).
    #[staticmethod]
    #[pyo3(signature = (passes, max_categories, n_bins, kinds = Vec::new(), memory_limit = None))]
    fn finish_together(
        py: Python<'_>,
        passes: Vec<PyRefMut<'_, PyOnePass>>,
        max_categories: usize,
        n_bins: usize,
        kinds: Vec<(String, String)>,
        memory_limit: Option<u64>,
    ) -> PyResult<Finished<Vec<Option<PyPairStats>>>> {
        let kinds = parse_kinds(kinds)?;
        let mut inner = Vec::with_capacity(passes.len());
        for mut pass in passes {
            inner.push(pass.inner.take().ok_or_else(finished_error)?);
        }
        let threads = threads::pool()?.current_num_threads();
        // The counts over the final codes must fit the memory limit, as a PairStats must.
        let check = move |codebook: &Codebook| {
            let cards = codebook.cardinalities();
            let tails = memory::tail_table_bytes(codebook);
            memory::check_fit(&cards, SLICE_ROWS, threads, tails, memory_limit)
        };
        let (learned, stats) = detached(py, move || {
            OnePass::finish_together(inner, max_categories, n_bins, &kinds, check)
        })?;
        let (codebook, caps, notes) = learned_parts(learned);
        let stats = stats
            .into_iter()
            .map(|s| s.map(PyPairStats::whole))
            .collect();
        Ok((codebook, caps, notes, stats))
    }
}

fn finished_error() -> PyErr {
    to_py(treewise_core::Error::Invalid(
        "this one-pass fit has already finished (or stopped at an error or an interrupt \
         mid-batch); start a new one"
            .into(),
    ))
}
