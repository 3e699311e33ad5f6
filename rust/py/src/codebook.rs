//! The Codebook class: the fixed codes of every column, their values and their bytes.

use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyList, PyTuple};
use treewise_core::codebook::Values;
use treewise_core::Codebook;

use crate::errors::{detached, to_py};

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
        let values: Py<PyAny> = match col.values() {
            Values::Bool(v) => PyList::new(py, v)?.into_any().unbind(),
            Values::Int(v) => PyList::new(py, v)?.into_any().unbind(),
            Values::UInt(v) => PyList::new(py, v)?.into_any().unbind(),
            Values::Str(v) => PyList::new(py, v.iter().map(|s| s.as_ref()))?
                .into_any()
                .unbind(),
            Values::Bins { edges, low, high } => PyTuple::new(
                py,
                [
                    PyList::new(py, edges)?.into_any(),
                    low.into_pyobject(py)?.into_any(),
                    high.into_pyobject(py)?.into_any(),
                ],
            )?
            .into_any()
            .unbind(),
        };
        Ok((
            col.values().kind().name().to_string(),
            values,
            col.has_other(),
            col.has_null(),
        ))
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
