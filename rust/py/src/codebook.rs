//! The Codebook class: the fixed codes of every column, their values and their bytes.

use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyList, PyTuple};
use treewise_core::codebook::{ColumnCode, Shape, Values};
use treewise_core::shape::Within;
use treewise_core::values::Kind;
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

    /// A codebook made from given values, with no summary of exact data (no tail tables): for
    /// public domains. Each column is (name, family, values, bins, has_other, has_null,
    /// integral, steps), where bins is (edges, low, high, specials) for a numeric column (values
    /// are then ignored) and None for a categorical one, and steps, when given, holds each bin's
    /// 65 equal-mass points (for example from a noisy histogram; see docs/privacy.md).
    #[staticmethod]
    #[allow(clippy::type_complexity)]
    fn from_columns(
        columns: Vec<(
            String,
            String,
            Bound<'_, PyAny>,
            Option<(Vec<f64>, f64, f64, Vec<f64>)>,
            bool,
            bool,
            bool,
            Option<Vec<Vec<f64>>>,
        )>,
    ) -> PyResult<PyCodebook> {
        let mut built = Vec::with_capacity(columns.len());
        for (name, family, values, bins, has_other, has_null, integral, steps) in columns {
            let kind = Kind::from_name(&family).ok_or_else(|| {
                to_py(treewise_core::Error::Invalid(format!(
                    "column '{name}': unknown value family {family:?}"
                )))
            })?;
            let values = match bins {
                Some((edges, low, high, specials)) => Values::Bins {
                    edges,
                    low,
                    high,
                    specials,
                },
                None => match kind {
                    Kind::Bool => Values::Bool(values.extract()?),
                    Kind::Int | Kind::Time => Values::Int(values.extract()?),
                    Kind::UInt => Values::UInt(values.extract()?),
                    Kind::Str => Values::Str(
                        values
                            .extract::<Vec<String>>()?
                            .into_iter()
                            .map(String::into_boxed_str)
                            .collect(),
                    ),
                    Kind::Float => Values::Float(values.extract()?),
                },
            };
            let shape = Shape {
                integral,
                within: steps
                    .unwrap_or_default()
                    .into_iter()
                    .map(Within::Steps)
                    .collect(),
                ..Shape::default()
            };
            built.push(
                ColumnCode::build(name, kind, values, has_other, has_null, shape).map_err(to_py)?,
            );
        }
        Ok(PyCodebook {
            inner: Codebook::new(built).map_err(to_py)?,
        })
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
