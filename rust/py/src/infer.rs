//! Bindings of exact inference: posteriors, evidence likelihoods, imputation and conditional
//! sampling over a fitted tree, each with the GIL released.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::fit;
use treewise_core::infer::{Filled, Inference, Posterior, Strategy};
use treewise_core::{io, Error};

use crate::arrow_import::import_batch;
use crate::buffers::{codes_and_floats, le_bytes};
use crate::codebook::PyCodebook;
use crate::errors::{detached, to_py};
use crate::mixture::PyMixtureComponent;
use crate::model::PyTreeModel;
use crate::pair_stats::PyPairStats;

/// Filled cells: (u16 codes column after column, 65535 where a cell was left as it was; per
/// column the f64 bytes of numbers placed in float bins, or None; values without a code per
/// column; rows whose evidence is impossible).
type FilledTuple<'py> = (
    Bound<'py, PyBytes>,
    Vec<Option<Bound<'py, PyBytes>>>,
    Vec<u64>,
    u64,
);

/// A fitted tree prepared for exact inference.
#[pyclass(name = "TreeInference", module = "treewise._core", frozen)]
pub struct PyTreeInference {
    inner: Inference,
}

fn filled<'py>(py: Python<'py>, f: &Filled, unseen: Vec<u64>) -> PyResult<FilledTuple<'py>> {
    let (codes, floats) = codes_and_floats(py, &f.codes, &f.floats)?;
    Ok((codes, floats, unseen, f.impossible))
}

impl PyTreeInference {
    /// The posterior of `targets` in each row of `batch` and the values without a code.
    fn posterior_of(
        &self,
        py: Python<'_>,
        batch: &Bound<'_, PyAny>,
        targets: Vec<usize>,
        fill: Option<Vec<usize>>,
    ) -> PyResult<(Posterior, Vec<u64>)> {
        let batch = import_batch(batch)?;
        let inf = &self.inner;
        detached(py, || {
            let ev = inf.evidence(&batch)?;
            let flags = fill
                .map(|fill| fill_flags(&fill, ev.unseen.len()))
                .transpose()?;
            Ok((
                inf.posterior_filling(&ev, &targets, flags.as_deref())?,
                ev.unseen,
            ))
        })
    }
}

/// Column indices as one flag per column; an index past the columns is an error.
fn fill_flags(fill: &[usize], d: usize) -> treewise_core::Result<Vec<bool>> {
    let mut flags = vec![false; d];
    for &c in fill {
        *flags
            .get_mut(c)
            .ok_or_else(|| Error::Invalid(format!("no column {c}")))? = true;
    }
    Ok(flags)
}

#[pymethods]
impl PyTreeInference {
    /// A fitted model prepared for inference; `backoff` pulls each child's table toward its
    /// marginal by that many pseudo-rows (0: the model's own tables).
    #[staticmethod]
    #[pyo3(signature = (model, backoff = 0.0))]
    fn from_model(py: Python<'_>, model: &PyTreeModel, backoff: f64) -> PyResult<Self> {
        let model = model.inner.clone();
        let inner = detached(py, move || Inference::with_backoff(model, backoff))?;
        Ok(PyTreeInference { inner })
    }

    /// One component of a mixture prepared for inference: its forest and tables, with the
    /// codebook (and the values behind codes) of `model`, the mixture's single tree.
    #[staticmethod]
    fn from_component(
        py: Python<'_>,
        model: &PyTreeModel,
        component: &PyMixtureComponent,
    ) -> PyResult<Self> {
        let model = model.inner.clone();
        let comp = component.inner.clone();
        let inner = detached(py, move || {
            let logp = comp.tables.into_iter().map(|t| t.logp).collect();
            Inference::from_tables(model, comp.parent, comp.order, logp)
        })?;
        Ok(PyTreeInference { inner })
    }

    /// From a model file's bytes (validated before use); `backoff` pulls each child's table
    /// toward its marginal by that many pseudo-rows (0: the model's own tables).
    #[staticmethod]
    #[pyo3(signature = (data, backoff = 0.0))]
    fn from_bytes(py: Python<'_>, data: &[u8], backoff: f64) -> PyResult<Self> {
        let inner = detached(py, || {
            Inference::with_backoff(io::model_from_bytes(data)?, backoff)
        })?;
        Ok(PyTreeInference { inner })
    }

    /// The maximum spanning tree of `weights` (one per pair, in pair order), oriented from
    /// `root`, with tables from `stats` counted with `codebook` (and `backoff` as above).
    #[staticmethod]
    #[allow(clippy::too_many_arguments)]
    #[pyo3(signature = (codebook, stats, dtypes, weights, root, alpha, backoff = 0.0))]
    fn from_weights(
        py: Python<'_>,
        codebook: &PyCodebook,
        stats: &PyPairStats,
        dtypes: Vec<String>,
        weights: Vec<f64>,
        root: usize,
        alpha: f64,
        backoff: f64,
    ) -> PyResult<Self> {
        let codebook = codebook.inner.clone();
        let stats = stats.counts()?;
        let inner = detached(py, move || {
            let model = fit::model_from_weights(codebook, dtypes, stats, weights, root, alpha)?;
            Inference::with_backoff(model, backoff)
        })?;
        Ok(PyTreeInference { inner })
    }

    /// A given forest (`parent[c]` = -1 for a root) with tables from `stats`.
    #[staticmethod]
    fn from_parents(
        py: Python<'_>,
        codebook: &PyCodebook,
        stats: &PyPairStats,
        dtypes: Vec<String>,
        parent: Vec<i64>,
        alpha: f64,
    ) -> PyResult<Self> {
        let codebook = codebook.inner.clone();
        let stats = stats.counts()?;
        let parent = parent
            .iter()
            .map(|&p| usize::try_from(p).ok())
            .collect::<Vec<_>>();
        let inner = detached(py, move || {
            Inference::new(fit::model_from_parents(
                codebook, dtypes, stats, parent, alpha,
            )?)
        })?;
        Ok(PyTreeInference { inner })
    }

    /// The model file's bytes.
    fn to_bytes<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyBytes>> {
        let model = self.inner.model();
        let bytes = detached(py, || Ok(io::model_to_bytes(model)))?;
        Ok(PyBytes::new(py, &bytes))
    }

    /// Each column's parent, -1 for a root.
    #[getter]
    fn parent(&self) -> Vec<i64> {
        self.inner
            .model()
            .parent()
            .iter()
            .map(|p| p.map_or(-1, |p| p as i64))
            .collect()
    }

    #[getter]
    fn alpha(&self) -> f64 {
        self.inner.model().alpha()
    }

    /// The number inside each code's bin at its middle (None for a column that is not float;
    /// NaN for the null code), as imputation fills float cells.
    fn bin_middles(&self, c: usize) -> PyResult<Option<Vec<f64>>> {
        let model = self.inner.model();
        let card = *model
            .codebook()
            .cardinalities()
            .get(c)
            .ok_or_else(|| to_py(Error::Invalid(format!("no column {c}"))))?;
        if model.value_in_bin(c, 0, 0.5).is_none() {
            return Ok(None);
        }
        Ok(Some(
            (0..card)
                .map(|k| model.value_in_bin(c, k, 0.5).unwrap_or(f64::NAN))
                .collect(),
        ))
    }

    /// Posterior marginals of `targets` given a batch with the model's columns: (per target the
    /// row-major n x r f64 bytes, NaN rows where the evidence is impossible; values without a
    /// code per column; impossible rows).
    #[allow(clippy::type_complexity)]
    #[pyo3(signature = (batch, targets, fill = None))]
    fn posterior<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        targets: Vec<usize>,
        fill: Option<Vec<usize>>,
    ) -> PyResult<(Vec<Bound<'py, PyBytes>>, Vec<u64>, u64)> {
        let (post, unseen) = self.posterior_of(py, batch, targets, fill)?;
        let tables = post
            .tables
            .iter()
            .map(|t| le_bytes(py, &[t]))
            .collect::<PyResult<_>>()?;
        Ok((tables, unseen, post.impossible))
    }

    /// As `posterior`, with ln P(observed cells) per row from the same pass (f64 bytes, -inf
    /// where impossible): (tables, log evidence, values without a code, impossible rows).
    #[allow(clippy::type_complexity)]
    #[pyo3(signature = (batch, targets, fill = None))]
    fn posterior_and_evidence<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        targets: Vec<usize>,
        fill: Option<Vec<usize>>,
    ) -> PyResult<(Vec<Bound<'py, PyBytes>>, Bound<'py, PyBytes>, Vec<u64>, u64)> {
        let (post, unseen) = self.posterior_of(py, batch, targets, fill)?;
        let tables = post
            .tables
            .iter()
            .map(|t| le_bytes(py, &[t]))
            .collect::<PyResult<_>>()?;
        let logz = le_bytes(py, &[&post.log_evidence])?;
        Ok((tables, logz, unseen, post.impossible))
    }

    /// ln P(observed cells) per row (f64 bytes, -inf where impossible) and the values without a
    /// code per column. With `fill` (column indices), a null in those columns is known to hold
    /// one of the column's values, as `impute` conditions.
    #[pyo3(signature = (batch, fill = None))]
    fn log_evidence<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        fill: Option<Vec<usize>>,
    ) -> PyResult<(Bound<'py, PyBytes>, Vec<u64>)> {
        let batch = import_batch(batch)?;
        let inf = &self.inner;
        let (logz, unseen) = detached(py, || {
            let ev = inf.evidence(&batch)?;
            let flags = fill
                .map(|fill| fill_flags(&fill, ev.unseen.len()))
                .transpose()?;
            Ok((inf.log_evidence_filling(&ev, flags.as_deref())?, ev.unseen))
        })?;
        Ok((le_bytes(py, &[&logz])?, unseen))
    }

    /// Fills the nulls of the columns in `fill` (indices) with strategy "joint", "marginal" or
    /// "sample"; row i of the batch samples from stream `first_row + i` of `seed`.
    #[allow(clippy::too_many_arguments)]
    fn impute<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        fill: Vec<usize>,
        strategy: &str,
        seed: u64,
        first_row: u64,
    ) -> PyResult<FilledTuple<'py>> {
        let strategy = match strategy {
            "joint" => Strategy::Joint,
            "marginal" => Strategy::Marginal,
            "sample" => Strategy::Sample,
            other => {
                return Err(to_py(Error::Invalid(format!(
                    "strategy must be 'joint', 'marginal' or 'sample', got {other:?}"
                ))))
            }
        };
        let batch = import_batch(batch)?;
        let inf = &self.inner;
        let (f, unseen) = detached(py, || {
            let ev = inf.evidence(&batch)?;
            let flags = fill_flags(&fill, ev.unseen.len())?;
            Ok((
                inf.impute(&ev, &flags, strategy, seed, first_row)?,
                ev.unseen,
            ))
        })?;
        filled(py, &f, unseen)
    }

    /// Draws `count` rows given a batch of evidence (one row for all, or one per row); the null
    /// cells are drawn. Row i samples from stream `first_row + i` of `seed`.
    fn sample_given<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        count: usize,
        first_row: u64,
        seed: u64,
    ) -> PyResult<FilledTuple<'py>> {
        let batch = import_batch(batch)?;
        let inf = &self.inner;
        let (f, unseen) = detached(py, || {
            let ev = inf.evidence(&batch)?;
            Ok((inf.sample_given(&ev, count, first_row, seed)?, ev.unseen))
        })?;
        filled(py, &f, unseen)
    }
}
