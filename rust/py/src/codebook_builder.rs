//! The CodebookBuilder class: the codebook pass, tallying batches before the codes are fixed.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::{CodebookBuilder, KindChoice, Learned};

use crate::arrow_import::import_batch;
use crate::codebook::PyCodebook;
use crate::errors::{detached, to_py};
use crate::pair_stats::is_interrupt;
use crate::slices;

/// What the cap did to one column: (column, values capped, rows capped).
pub(crate) type CapTuple = (String, usize, u64);
/// A note on one column: (column, "left out" or "constant", message).
pub(crate) type NoteTuple = (String, String, String);

/// The codebook pass: tallies every batch, then fixes the codes.
#[pyclass(name = "CodebookBuilder", module = "treewise._core")]
pub(crate) struct PyCodebookBuilder {
    inner: Option<CodebookBuilder>,
}

#[pymethods]
impl PyCodebookBuilder {
    #[new]
    fn new(names: Vec<String>) -> Self {
        PyCodebookBuilder {
            inner: Some(CodebookBuilder::new(names)),
        }
    }

    /// Tallies one Arrow record batch (any object with `__arrow_c_array__`).
    fn observe(&mut self, py: Python<'_>, batch: &Bound<'_, PyAny>) -> PyResult<()> {
        let batch = import_batch(batch)?;
        let builder = self.builder()?;
        for slice in slices(&batch) {
            if let Err(e) = detached(py, || builder.observe(&slice)) {
                // Some columns may have tallied part of the slice: the builder is spent.
                if is_interrupt(py, &e) {
                    self.inner = None;
                }
                return Err(e);
            }
            py.check_signals()?;
        }
        Ok(())
    }

    /// Adds another builder's tallies (the same columns, other data).
    fn merge(&mut self, py: Python<'_>, other: &PyCodebookBuilder) -> PyResult<()> {
        let theirs = other.inner.as_ref().ok_or_else(finished_error)?;
        let mine = self.builder()?;
        detached(py, || mine.merge(theirs))
    }

    /// The tallies as bytes (for sending between processes).
    fn to_bytes<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyBytes>> {
        let builder = self.inner.as_ref().ok_or_else(finished_error)?;
        Ok(PyBytes::new(
            py,
            &treewise_core::io::tallies_to_bytes(builder),
        ))
    }

    /// Reads tallies written by `to_bytes`.
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> PyResult<Self> {
        let builder = detached(py, || treewise_core::io::tallies_from_bytes(data))?;
        Ok(PyCodebookBuilder {
            inner: Some(builder),
        })
    }

    /// Rows observed so far.
    #[getter]
    fn rows(&self) -> PyResult<u64> {
        Ok(self.inner.as_ref().map_or(0, CodebookBuilder::rows))
    }

    /// Fixes the codes; `kinds` maps column names to "auto", "categorical", "numeric" or
    /// "ignore". Returns the codebook, a list of (column, values capped, rows capped) and notes
    /// on columns left out or constant.
    #[pyo3(signature = (max_categories, n_bins, kinds = Vec::new()))]
    fn finish(
        &mut self,
        py: Python<'_>,
        max_categories: usize,
        n_bins: usize,
        kinds: Vec<(String, String)>,
    ) -> PyResult<(PyCodebook, Vec<CapTuple>, Vec<NoteTuple>)> {
        let kinds = parse_kinds(kinds)?;
        let builder = self.inner.take().ok_or_else(finished_error)?;
        let learned = detached(py, move || builder.finish(max_categories, n_bins, &kinds))?;
        Ok(learned_parts(learned))
    }
}

/// `kinds` as (column, kind name) pairs, checked.
pub(crate) fn parse_kinds(kinds: Vec<(String, String)>) -> PyResult<Vec<(String, KindChoice)>> {
    kinds
        .into_iter()
        .map(|(column, kind)| match KindChoice::from_name(&kind) {
            Some(k) => Ok((column, k)),
            None => Err(to_py(treewise_core::Error::Invalid(format!(
                "kinds[{column:?}] is {kind:?}; use 'auto', 'categorical', 'numeric' or 'ignore'"
            )))),
        })
        .collect()
}

/// The end of a codebook pass for Python: the codebook, what the cap did, notes on columns.
pub(crate) fn learned_parts(learned: Learned) -> (PyCodebook, Vec<CapTuple>, Vec<NoteTuple>) {
    let caps = learned
        .caps
        .into_iter()
        .map(|c| (c.column, c.values_capped, c.rows_capped))
        .collect();
    let notes = learned
        .notes
        .into_iter()
        .map(|n| (n.column, n.kind.to_string(), n.message))
        .collect();
    (
        PyCodebook {
            inner: learned.codebook,
        },
        caps,
        notes,
    )
}

impl PyCodebookBuilder {
    fn builder(&mut self) -> PyResult<&mut CodebookBuilder> {
        self.inner.as_mut().ok_or_else(finished_error)
    }
}

fn finished_error() -> PyErr {
    to_py(treewise_core::Error::Invalid(
        "this codebook builder has already finished (or was interrupted mid-batch); start a new \
         one"
        .into(),
    ))
}
