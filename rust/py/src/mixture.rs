//! Bindings of the mixture of trees: encoding rows once, weighted counts, components, E-step.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::mixture::{self, Component};
use treewise_core::Error;

use crate::arrow_import::import_batch;
use crate::buffers::{codes_and_floats, le_bytes};
use crate::errors::{detached, to_py};
use crate::model::PyTreeModel;
use crate::slices;

/// Little-endian bytes as numbers of one width; a length that is not a multiple is an error.
fn from_le<const W: usize, T>(data: &[u8], what: &str, f: fn([u8; W]) -> T) -> PyResult<Vec<T>> {
    if !data.len().is_multiple_of(W) {
        return Err(to_py(Error::Invalid(format!(
            "{what}: {} bytes is not a whole number of {W}-byte values",
            data.len()
        ))));
    }
    Ok(data
        .chunks_exact(W)
        .map(|c| {
            let mut a = [0u8; W];
            a.copy_from_slice(c);
            f(a)
        })
        .collect())
}

/// Fitted core components as Python objects.
pub(crate) fn wrap(comps: Vec<Component>) -> Vec<PyMixtureComponent> {
    comps
        .into_iter()
        .map(|inner| PyMixtureComponent { inner })
        .collect()
}

/// The rows of a table as code columns (u16), kept in Rust across EM iterations.
#[pyclass(name = "MixtureCodes", module = "treewise._core")]
pub struct PyMixtureCodes {
    codes: Vec<Vec<u16>>,
    cards: Vec<usize>,
}

/// One fitted component of a mixture: its tree and smoothed tables.
#[pyclass(name = "MixtureComponent", module = "treewise._core")]
#[derive(Clone)]
pub struct PyMixtureComponent {
    pub(crate) inner: Component,
}

impl PyMixtureCodes {
    /// The codes of `batch`, the tail terms per column and the values per column without a code.
    #[allow(clippy::type_complexity)]
    fn encode_parts(
        py: Python<'_>,
        model: &PyTreeModel,
        batch: &Bound<'_, PyAny>,
    ) -> PyResult<(PyMixtureCodes, Vec<Option<Vec<f64>>>, Vec<u64>)> {
        let batch = import_batch(batch)?;
        let model = &model.inner;
        let cards = model.codebook().cardinalities();
        let d = cards.len();
        let mut codes: Vec<Vec<u16>> = vec![Vec::with_capacity(batch.num_rows()); d];
        let mut tails: Vec<Option<Vec<f64>>> = vec![None; d];
        for slice in slices(&batch) {
            let (part, terms) = detached(py, || {
                let slice = treewise_core::times::conform_times(&slice, model.dtypes())?;
                let part = model.codebook().encode(&slice, false)?;
                let terms = model.tail_terms(&slice, &part)?;
                Ok((part, terms))
            })?;
            let before = codes[0].len();
            for (c, t) in terms.into_iter().enumerate() {
                if let Some(t) = t {
                    let column = tails[c].get_or_insert_with(|| vec![0.0; before]);
                    column.extend(t);
                } else if let Some(column) = &mut tails[c] {
                    column.resize(before + slice.num_rows(), 0.0);
                }
            }
            codes.iter_mut().zip(part).for_each(|(c, p)| c.extend(p));
            py.check_signals()?;
        }
        let unseen = codes
            .iter()
            .map(|c| c.iter().filter(|x| **x == u16::MAX).count() as u64)
            .collect();
        Ok((PyMixtureCodes { codes, cards }, tails, unseen))
    }
}

#[pymethods]
impl PyMixtureCodes {
    /// Code columns (u16 little-endian bytes, one per column) with each column's cardinality.
    #[new]
    fn new(codes: Vec<Vec<u8>>, cards: Vec<usize>) -> PyResult<Self> {
        let codes = codes
            .iter()
            .map(|c| from_le::<2, u16>(c, "codes", u16::from_le_bytes))
            .collect::<PyResult<Vec<_>>>()?;
        if codes.len() != cards.len() || codes.is_empty() {
            return Err(to_py(Error::Invalid(format!(
                "{} code columns for {} cardinalities",
                codes.len(),
                cards.len()
            ))));
        }
        Ok(PyMixtureCodes { codes, cards })
    }

    /// Encodes `batch` (the model's columns, in order) with `model`'s codebook, leniently:
    /// returns the codes, ln P(value | code) summed over the columns per row (the tail tables
    /// behind "other", shared by every component) and how many values per column had no code.
    #[staticmethod]
    fn encode<'py>(
        py: Python<'py>,
        model: &PyTreeModel,
        batch: &Bound<'py, PyAny>,
    ) -> PyResult<(PyMixtureCodes, Bound<'py, PyBytes>, Vec<u64>)> {
        let (codes, terms, unseen) = Self::encode_parts(py, model, batch)?;
        let mut tails = vec![0.0; codes.n_rows()];
        for t in terms.iter().flatten() {
            tails.iter_mut().zip(t).for_each(|(s, t)| *s += t);
        }
        Ok((codes, le_bytes(py, &[&tails])?, unseen))
    }

    /// As `encode`, with the tail terms per column (None for a column without a tail table).
    #[staticmethod]
    #[allow(clippy::type_complexity)]
    fn encode_columns<'py>(
        py: Python<'py>,
        model: &PyTreeModel,
        batch: &Bound<'py, PyAny>,
    ) -> PyResult<(PyMixtureCodes, Vec<Option<Bound<'py, PyBytes>>>, Vec<u64>)> {
        let (codes, terms, unseen) = Self::encode_parts(py, model, batch)?;
        let terms = terms
            .iter()
            .map(|t| t.as_ref().map(|t| le_bytes(py, &[t])).transpose())
            .collect::<PyResult<_>>()?;
        Ok((codes, terms, unseen))
    }

    /// ln P_k(x_c | x_parent) of every column of every row, under the component `which[row]`
    /// (the tail terms left out): one f64 bytes column per model column.
    fn column_terms<'py>(
        &self,
        py: Python<'py>,
        components: Vec<PyRef<'py, PyMixtureComponent>>,
        which: &[u8],
    ) -> PyResult<Vec<Bound<'py, PyBytes>>> {
        let which = from_le::<4, u32>(which, "components", u32::from_le_bytes)?;
        let comps: Vec<Component> = components.iter().map(|c| c.inner.clone()).collect();
        let terms = detached(py, || {
            mixture::column_terms(&self.codes, &self.cards, &comps, &which)
        })?;
        terms.iter().map(|t| le_bytes(py, &[t])).collect()
    }

    #[getter]
    fn n_rows(&self) -> usize {
        self.codes.first().map_or(0, Vec::len)
    }

    /// Column `c`'s codes as u16 bytes.
    fn column<'py>(&self, py: Python<'py>, c: usize) -> PyResult<Bound<'py, PyBytes>> {
        let col = self
            .codes
            .get(c)
            .ok_or_else(|| to_py(Error::Invalid(format!("no column {c}"))))?;
        le_bytes(py, &[col])
    }

    /// Per component: (total weight, marginals as f64 bytes, pair tables as f64 bytes in
    /// pair-index order), from responsibilities `resp` (f64 bytes, rows x k, row-major).
    #[allow(clippy::type_complexity)]
    fn weighted_stats<'py>(
        &self,
        py: Python<'py>,
        resp: &[u8],
        k: usize,
    ) -> PyResult<Vec<(f64, Vec<Bound<'py, PyBytes>>, Vec<Bound<'py, PyBytes>>)>> {
        let resp = from_le::<8, f64>(resp, "responsibilities", f64::from_le_bytes)?;
        let stats = detached(py, || {
            mixture::weighted_stats(&self.codes, &self.cards, &resp, k)
        })?;
        stats
            .iter()
            .map(|s| {
                let m = s
                    .marginals
                    .iter()
                    .map(|m| le_bytes(py, &[m]))
                    .collect::<PyResult<_>>()?;
                let t = s
                    .tables
                    .iter()
                    .map(|t| le_bytes(py, &[t]))
                    .collect::<PyResult<_>>()?;
                Ok((s.n, m, t))
            })
            .collect()
    }

    /// The M-step: per component, the weighted counts, its Chow–Liu tree and tables smoothed by
    /// `alpha`.
    #[pyo3(signature = (resp, k, alpha, pooling = 0.0))]
    fn fit_components(
        &self,
        py: Python<'_>,
        resp: &[u8],
        k: usize,
        alpha: f64,
        pooling: f64,
    ) -> PyResult<Vec<PyMixtureComponent>> {
        let resp = from_le::<8, f64>(resp, "responsibilities", f64::from_le_bytes)?;
        let comps = detached(py, || {
            let stats = mixture::weighted_stats(&self.codes, &self.cards, &resp, k)?;
            mixture::fit_components(&self.cards, &stats, alpha, pooling)
        })?;
        Ok(wrap(comps))
    }

    /// Hard EM's M-step: components fitted to the exact counts of the rows assigned to each
    /// (`assign`: u32 bytes, one component index per row, each below `k`).
    #[pyo3(signature = (assign, k, alpha, pooling = 0.0))]
    fn fit_assigned(
        &self,
        py: Python<'_>,
        assign: &[u8],
        k: usize,
        alpha: f64,
        pooling: f64,
    ) -> PyResult<Vec<PyMixtureComponent>> {
        let assign = from_le::<4, u32>(assign, "assignments", u32::from_le_bytes)?;
        let comps = detached(py, || {
            let stats = mixture::assigned_stats(&self.codes, &self.cards, &assign, k)?;
            mixture::fit_components(&self.cards, &stats, alpha, pooling)
        })?;
        Ok(wrap(comps))
    }

    /// ln P(row | component) for every row and component (f64 bytes, rows x k, row-major).
    fn log_likelihoods<'py>(
        &self,
        py: Python<'py>,
        components: Vec<PyRef<'py, PyMixtureComponent>>,
    ) -> PyResult<Bound<'py, PyBytes>> {
        let comps: Vec<Component> = components.iter().map(|c| c.inner.clone()).collect();
        let out = detached(py, || {
            mixture::log_likelihoods(&self.codes, &self.cards, &comps)
        })?;
        le_bytes(py, &[&out])
    }
}

#[pymethods]
impl PyMixtureComponent {
    /// A component from stored parts, checked as a model file is: `counts` are f64 bytes per
    /// column (parent code x code), `parent` is -1 for the root.
    #[staticmethod]
    fn from_counts(
        cards: Vec<usize>,
        root: usize,
        parent: Vec<i64>,
        counts: Vec<Vec<u8>>,
        pair_mi: Vec<f64>,
        alpha: f64,
    ) -> PyResult<Self> {
        let parent = parent
            .into_iter()
            .map(|p| usize::try_from(p).ok())
            .collect();
        let counts = counts
            .iter()
            .map(|c| from_le::<8, f64>(c, "counts", f64::from_le_bytes))
            .collect::<PyResult<Vec<_>>>()?;
        let inner = mixture::component_from_counts(&cards, root, parent, counts, pair_mi, alpha)
            .map_err(to_py)?;
        Ok(PyMixtureComponent { inner })
    }

    #[getter]
    fn root(&self) -> usize {
        self.inner.root
    }

    /// Each column's parent, -1 for the root.
    #[getter]
    fn parent(&self) -> Vec<i64> {
        self.inner
            .parent
            .iter()
            .map(|p| p.map_or(-1, |p| i64::try_from(p).unwrap_or(-1)))
            .collect()
    }

    #[getter]
    fn pair_mi(&self) -> Vec<f64> {
        self.inner.pair_mi.clone()
    }

    /// Column `c`'s weighted counts with its parent (parent x child, row-major), f64 bytes.
    fn counts<'py>(&self, py: Python<'py>, c: usize) -> PyResult<Bound<'py, PyBytes>> {
        let counts = self
            .inner
            .counts
            .get(c)
            .ok_or_else(|| to_py(Error::Invalid(format!("no column {c}"))))?;
        le_bytes(py, &[counts])
    }

    /// Column `c`'s ln P(x | parent code), row-major (one row for the root), f64 bytes.
    fn log_table<'py>(&self, py: Python<'py>, c: usize) -> PyResult<Bound<'py, PyBytes>> {
        let table = self
            .inner
            .tables
            .get(c)
            .ok_or_else(|| to_py(Error::Invalid(format!("no column {c}"))))?;
        le_bytes(py, &[&table.logp])
    }
}

/// Sampled rows as bytes: codes, numbers in numeric bins, tail entries, and each row's
/// component (u32).
type MixtureSampled<'py> = (
    Bound<'py, PyBytes>,
    Vec<Option<Bound<'py, PyBytes>>>,
    Vec<Option<Bound<'py, PyBytes>>>,
    Bound<'py, PyBytes>,
);

/// Draws `count` rows from the mixture of `components` with `weights`, decoded through
/// `model` (the single tree whose codebook the mixture shares); see `mixture::sample`.
#[pyfunction]
pub fn mixture_sample<'py>(
    py: Python<'py>,
    model: &PyTreeModel,
    components: Vec<PyRef<'py, PyMixtureComponent>>,
    weights: Vec<f64>,
    start: u64,
    count: usize,
    seed: u64,
) -> PyResult<MixtureSampled<'py>> {
    let comps: Vec<Component> = components.iter().map(|c| c.inner.clone()).collect();
    let model = &model.inner;
    let (sampled, which) = detached(py, || {
        mixture::sample(&comps, &weights, model, start, count, seed)
    })?;
    let (codes, floats) = codes_and_floats(py, &sampled.codes, &sampled.floats)?;
    let tails = sampled
        .tails
        .iter()
        .map(|t| t.as_ref().map(|t| le_bytes(py, &[t])).transpose())
        .collect::<PyResult<_>>()?;
    Ok((codes, floats, tails, le_bytes(py, &[&which])?))
}
