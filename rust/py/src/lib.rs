//! treewise._core: thin pyo3 bindings over treewise-core (type conversion, GIL release, errors).

mod arrow_import;
mod buffers;
mod errors;
mod infer;
mod model;
mod threads;

use arrow_array::RecordBatch;
use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyList, PyTuple};
use treewise_core::codebook::Values;
use treewise_core::shape::Within;
use treewise_core::{Codebook, CodebookBuilder, KindChoice, PairStats};

use crate::arrow_import::import_batch;
use crate::buffers::le_bytes;
use crate::errors::{detached, to_py};

/// Rows per core call: between calls the GIL is taken back and Ctrl-C is checked, so a huge
/// batch is still interrupted within a fraction of a second.
pub(crate) const SLICE_ROWS: usize = 1 << 18;

/// A batch as zero-copy slices of at most [`SLICE_ROWS`] rows.
pub(crate) fn slices(batch: &RecordBatch) -> Vec<RecordBatch> {
    let n = batch.num_rows();
    if n <= SLICE_ROWS {
        return vec![batch.clone()];
    }
    (0..n)
        .step_by(SLICE_ROWS)
        .map(|start| batch.slice(start, SLICE_ROWS.min(n - start)))
        .collect()
}

/// What the cap did to one column: (column, values capped, rows capped).
type CapTuple = (String, usize, u64);
/// A note on one column: (column, "left out" or "constant", message).
type NoteTuple = (String, String, String);

/// The codebook pass: tallies every batch, then fixes the codes.
#[pyclass(name = "CodebookBuilder", module = "treewise._core")]
struct PyCodebookBuilder {
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
            detached(py, || builder.observe(&slice))?;
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
        let kinds = kinds
            .into_iter()
            .map(|(column, kind)| match KindChoice::from_name(&kind) {
                Some(k) => Ok((column, k)),
                None => Err(to_py(treewise_core::Error::Invalid(format!(
                    "kinds[{column:?}] is {kind:?}; use 'auto', 'categorical', 'numeric' or \
                     'ignore'"
                )))),
            })
            .collect::<PyResult<Vec<_>>>()?;
        let builder = self.inner.take().ok_or_else(finished_error)?;
        let learned = detached(py, move || builder.finish(max_categories, n_bins, &kinds))?;
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
        Ok((
            PyCodebook {
                inner: learned.codebook,
            },
            caps,
            notes,
        ))
    }
}

impl PyCodebookBuilder {
    fn builder(&mut self) -> PyResult<&mut CodebookBuilder> {
        self.inner.as_mut().ok_or_else(finished_error)
    }
}

fn finished_error() -> PyErr {
    to_py(treewise_core::Error::Invalid(
        "this codebook builder has already finished".into(),
    ))
}

/// A fixed codebook: the codes of every column.
#[pyclass(name = "Codebook", module = "treewise._core", frozen)]
pub(crate) struct PyCodebook {
    pub(crate) inner: Codebook,
}

#[pymethods]
impl PyCodebook {
    /// The column names, in order.
    #[getter]
    fn names(&self) -> Vec<String> {
        self.inner
            .columns()
            .iter()
            .map(|c| c.name().to_string())
            .collect()
    }

    /// Each column's number of codes.
    #[getter]
    fn cardinalities(&self) -> Vec<usize> {
        self.inner.cardinalities()
    }

    /// Column `i` as (kind, values, has_other, has_null). For floats, values is
    /// (edges, low, high).
    fn column(&self, py: Python<'_>, i: usize) -> PyResult<(String, Py<PyAny>, bool, bool)> {
        let col = self
            .inner
            .columns()
            .get(i)
            .ok_or_else(|| to_py(treewise_core::Error::Invalid(format!("no column {i}"))))?;
        let values = values_object(py, col.values())?;
        Ok((
            col.family().name().to_string(),
            values,
            col.has_other(),
            col.has_null(),
        ))
    }

    /// What column `i`'s codes hold: (kind: "categorical", "numeric" or "constant"; integral;
    /// the tail behind "other" as (values, counts, rest_values, rest_rows) or None; per bin
    /// ("atoms", values, counts) or ("steps", points, None)).
    #[allow(clippy::type_complexity)]
    fn shape(
        &self,
        py: Python<'_>,
        i: usize,
    ) -> PyResult<(
        String,
        bool,
        Option<(Py<PyAny>, Vec<u64>, u64, u64)>,
        Vec<(String, Vec<f64>, Option<Vec<u64>>)>,
    )> {
        let col = self
            .inner
            .columns()
            .get(i)
            .ok_or_else(|| to_py(treewise_core::Error::Invalid(format!("no column {i}"))))?;
        let shape = col.shape();
        let tail = match &shape.tail {
            Some(t) => Some((
                values_object(py, &t.values)?,
                t.counts.clone(),
                t.rest_values,
                t.rest_rows,
            )),
            None => None,
        };
        let within = shape
            .within
            .iter()
            .map(|w| match w {
                Within::Atoms { values, counts } => {
                    ("atoms".to_string(), values.clone(), Some(counts.clone()))
                }
                Within::Steps(points) => ("steps".to_string(), points.clone(), None),
            })
            .collect();
        Ok((col.model_kind().to_string(), shape.integral, tail, within))
    }

    fn __len__(&self) -> usize {
        self.inner.columns().len()
    }

    /// The codebook as bytes (our own layout; see docs/model-format.md).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Bound<'py, PyBytes> {
        PyBytes::new(py, &treewise_core::io::codebook_to_bytes(&self.inner))
    }

    /// Reads a codebook written by `to_bytes`, validating it.
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> PyResult<Self> {
        let inner = detached(py, || treewise_core::io::codebook_from_bytes(data))?;
        Ok(PyCodebook { inner })
    }

    /// The same codebook restricted to some columns, in the order given.
    fn select(&self, names: Vec<String>) -> PyResult<PyCodebook> {
        let columns = names
            .iter()
            .map(|n| {
                self.inner
                    .columns()
                    .iter()
                    .find(|c| c.name() == n)
                    .cloned()
                    .ok_or_else(|| {
                        to_py(treewise_core::Error::Schema(format!(
                            "column '{n}' is not in the codebook"
                        )))
                    })
            })
            .collect::<PyResult<Vec<_>>>()?;
        Ok(PyCodebook {
            inner: Codebook::new(columns).map_err(to_py)?,
        })
    }

    fn __eq__(&self, other: &PyCodebook) -> bool {
        self.inner == other.inner
    }
}

/// Exact pair counts over one codebook's codes.
#[pyclass(name = "PairStats", module = "treewise._core")]
pub(crate) struct PyPairStats {
    pub(crate) inner: PairStats,
}

#[pymethods]
impl PyPairStats {
    #[new]
    fn new(codebook: &PyCodebook) -> PyResult<Self> {
        let inner = PairStats::new(codebook.inner.cardinalities()).map_err(to_py)?;
        Ok(PyPairStats { inner })
    }

    /// Encodes one Arrow record batch with `codebook` and adds its counts.
    fn update(
        &mut self,
        py: Python<'_>,
        codebook: &PyCodebook,
        batch: &Bound<'_, PyAny>,
    ) -> PyResult<()> {
        let batch = import_batch(batch)?;
        let stats = &mut self.inner;
        let codebook = &codebook.inner;
        for slice in slices(&batch) {
            detached(py, || {
                let codes = codebook.encode(&slice, true)?;
                stats.add_codes(&codes)
            })?;
            py.check_signals()?;
        }
        Ok(())
    }

    /// These counts with the codebook they were counted with and each column's output type
    /// name, as a pair-statistics file.
    fn to_bytes<'py>(
        &self,
        py: Python<'py>,
        codebook: &PyCodebook,
        dtypes: Vec<String>,
    ) -> PyResult<Bound<'py, PyBytes>> {
        if codebook.inner.cardinalities() != self.inner.cardinalities() {
            return Err(to_py(treewise_core::Error::Schema(
                "these statistics were not counted with this codebook".into(),
            )));
        }
        let bytes = treewise_core::io::stats_to_bytes(&codebook.inner, &dtypes, &self.inner);
        Ok(PyBytes::new(py, &bytes))
    }

    /// Reads a pair-statistics file: (codebook, type names, statistics), validated before use.
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> PyResult<(PyCodebook, Vec<String>, PyPairStats)> {
        let (codebook, dtypes, stats) = detached(py, || treewise_core::io::stats_from_bytes(data))?;
        Ok((
            PyCodebook { inner: codebook },
            dtypes,
            PyPairStats { inner: stats },
        ))
    }

    /// An independent copy of these counts.
    fn copy(&self) -> PyPairStats {
        PyPairStats {
            inner: self.inner.clone(),
        }
    }

    fn __eq__(&self, other: &PyPairStats) -> bool {
        self.inner == other.inner
    }

    /// Adds another PairStats' counts to these.
    fn merge(&mut self, py: Python<'_>, other: &PyPairStats) -> PyResult<()> {
        let stats = &mut self.inner;
        let other = &other.inner;
        detached(py, || stats.merge(other))
    }

    /// Rows counted.
    #[getter]
    fn n_rows(&self) -> u64 {
        self.inner.n_rows()
    }

    /// Each column's number of codes.
    #[getter]
    fn cardinalities(&self) -> Vec<usize> {
        self.inner.cardinalities().to_vec()
    }

    /// Column `i`'s counts, as little-endian u64 bytes.
    fn marginal<'py>(&self, py: Python<'py>, i: usize) -> PyResult<Bound<'py, PyBytes>> {
        let d = self.inner.n_columns();
        if i >= d {
            return Err(to_py(treewise_core::Error::Invalid(format!(
                "no column {i} of {d}"
            ))));
        }
        le_bytes(py, &[self.inner.marginal(i)])
    }

    /// The table of columns i < j (row-major r_i x r_j), as little-endian u64 bytes.
    fn table<'py>(&self, py: Python<'py>, i: usize, j: usize) -> PyResult<Bound<'py, PyBytes>> {
        let d = self.inner.n_columns();
        if i >= j || j >= d {
            return Err(to_py(treewise_core::Error::Invalid(format!(
                "a table needs columns i < j < {d}, got ({i}, {j})"
            ))));
        }
        le_bytes(py, &[self.inner.table(i, j)])
    }
}

/// The survival function of the chi-square distribution (exposed for the tests).
#[pyfunction]
fn chi2_sf(x: f64, dof: u64) -> f64 {
    treewise_core::weights::chi2_sf(x, dof)
}

/// How many threads treewise's pool runs (set by TREEWISE_THREADS before the first call).
#[pyfunction]
fn thread_count() -> PyResult<usize> {
    threads::pool().map(|p| p.current_num_threads())
}

#[pymodule]
fn _core(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add_class::<PyCodebookBuilder>()?;
    m.add_class::<PyCodebook>()?;
    m.add_class::<PyPairStats>()?;
    m.add_class::<model::PyTreeModel>()?;
    m.add_class::<infer::PyTreeInference>()?;
    m.add("SAMPLE_BLOCK", treewise_core::model::SAMPLE_BLOCK)?;
    m.add_function(wrap_pyfunction!(chi2_sf, m)?)?;
    m.add_function(wrap_pyfunction!(thread_count, m)?)?;
    m.add("DEBUG_BUILD", cfg!(debug_assertions))?;
    Ok(())
}

/// Kept values as a Python list, or (edges, low, high, specials) for bins.
fn values_object(py: Python<'_>, values: &Values) -> PyResult<Py<PyAny>> {
    Ok(match values {
        Values::Bool(v) => PyList::new(py, v)?.into_any().unbind(),
        Values::Int(v) => PyList::new(py, v)?.into_any().unbind(),
        Values::UInt(v) => PyList::new(py, v)?.into_any().unbind(),
        Values::Str(v) => PyList::new(py, v.iter().map(|s| s.as_ref()))?
            .into_any()
            .unbind(),
        Values::Float(v) => PyList::new(py, v)?.into_any().unbind(),
        Values::Bins {
            edges,
            low,
            high,
            specials,
        } => PyTuple::new(
            py,
            [
                PyList::new(py, edges)?.into_any(),
                low.into_pyobject(py)?.into_any(),
                high.into_pyobject(py)?.into_any(),
                PyList::new(py, specials)?.into_any(),
            ],
        )?
        .into_any()
        .unbind(),
    })
}
