//! Bindings of the fitted model: fit, smoothing, scoring, sampling and the model file.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::fit::{self, Prune};
use treewise_core::model::{Sampled, Scored, TreeModel};
use treewise_core::{io, memory, Error};

use crate::arrow_import::import_batch;
use crate::buffers::{codes_and_floats, le_bytes};
use crate::codebook::PyCodebook;
use crate::errors::{detached, to_py};
use crate::pair_stats::PyPairStats;
use crate::{slices, SLICE_ROWS};

/// Sampled rows as bytes: codes, the numbers drawn in numeric bins and the tail entries drawn
/// behind "other" (see `sample`).
type SampledBytes<'py> = (
    Bound<'py, PyBytes>,
    Vec<Option<Bound<'py, PyBytes>>>,
    Vec<Option<Bound<'py, PyBytes>>>,
);

/// One edge: (parent, child, mutual_info, g_statistic, dof, p_value).
type EdgeTuple = (usize, usize, f64, f64, u64, f64);

/// A fitted dependency tree.
#[pyclass(name = "TreeModel", module = "treewise._core")]
pub struct PyTreeModel {
    pub(crate) inner: TreeModel,
    /// The privacy statement of a private fit (saved with the model), None otherwise.
    pub(crate) statement: Option<String>,
}

#[pymethods]
impl PyTreeModel {
    /// Fits the Chow–Liu tree of `stats` (counted with `codebook`), oriented from `root`;
    /// `prune` is "none", "bic" or "level" (with `level`, the G-test's significance level).
    #[staticmethod]
    #[pyo3(signature = (codebook, stats, dtypes, root, alpha, prune="none", level=0.0))]
    #[allow(clippy::too_many_arguments)]
    fn fit(
        py: Python<'_>,
        codebook: &PyCodebook,
        stats: &PyPairStats,
        dtypes: Vec<String>,
        root: Option<usize>,
        alpha: f64,
        prune: &str,
        level: f64,
    ) -> PyResult<Self> {
        let prune = match prune {
            "none" => Prune::None,
            "bic" => Prune::Bic,
            "level" => Prune::Level(level),
            other => {
                return Err(to_py(Error::Invalid(format!(
                    "prune must be 'none', 'bic' or 'level', got {other:?}"
                ))))
            }
        };
        let codebook = codebook.inner.clone();
        let stats = stats.counts()?;
        let inner = detached(py, move || {
            fit::fit_model(codebook, dtypes, stats, root, alpha, prune)
        })?;
        Ok(PyTreeModel {
            inner,
            statement: None,
        })
    }

    /// A model from given counts (for example released noisy ones): per column its counts with
    /// its parent (parent x child, row-major) or, for a root, its marginal; `parent` is -1 for a
    /// root. Every count and link is checked as for a model file.
    #[staticmethod]
    #[allow(clippy::too_many_arguments)]
    fn from_counts(
        codebook: &PyCodebook,
        dtypes: Vec<String>,
        n_rows: u64,
        root: usize,
        parent: Vec<i64>,
        counts: Vec<Vec<u64>>,
        pair_mi: Vec<f64>,
        alpha: f64,
    ) -> PyResult<Self> {
        let parent = parent
            .into_iter()
            .map(|p| usize::try_from(p).ok())
            .collect();
        let inner = TreeModel::new(
            codebook.inner.clone(),
            dtypes,
            n_rows,
            root,
            parent,
            counts,
            pair_mi,
            alpha,
        )
        .map_err(to_py)?;
        Ok(PyTreeModel {
            inner,
            statement: None,
        })
    }

    /// Reads a model file's bytes, validating everything before use.
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> PyResult<Self> {
        let (inner, statement) = detached(py, || io::model_and_statement_from_bytes(data))?;
        Ok(PyTreeModel { inner, statement })
    }

    /// The model file's bytes (with the privacy statement of a private fit).
    fn to_bytes<'py>(&self, py: Python<'py>) -> PyResult<Bound<'py, PyBytes>> {
        let model = &self.inner;
        let statement = self.statement.as_deref();
        let bytes = detached(py, || {
            Ok(match statement {
                Some(s) => io::private_model_to_bytes(model, s),
                None => io::model_to_bytes(model),
            })
        })?;
        Ok(PyBytes::new(py, &bytes))
    }

    /// The privacy statement of a private fit (a JSON text), None for any other model.
    #[getter]
    fn privacy(&self) -> Option<String> {
        self.statement.clone()
    }

    /// Attaches the privacy statement of a private fit.
    fn set_privacy(&mut self, statement: String) {
        self.statement = Some(statement);
    }

    #[getter]
    fn alpha(&self) -> f64 {
        self.inner.alpha()
    }

    /// Changes the smoothing without refitting.
    fn set_alpha(&mut self, alpha: f64) -> PyResult<()> {
        self.inner.set_alpha(alpha).map_err(to_py)
    }

    #[getter]
    fn codebook(&self) -> PyCodebook {
        PyCodebook {
            inner: self.inner.codebook().clone(),
        }
    }

    #[getter]
    fn dtypes(&self) -> Vec<String> {
        self.inner.dtypes().to_vec()
    }

    #[getter]
    fn n_rows(&self) -> u64 {
        self.inner.n_rows()
    }

    #[getter]
    fn root(&self) -> usize {
        self.inner.root()
    }

    /// Each column's parent, -1 for a root.
    #[getter]
    fn parent(&self) -> Vec<i64> {
        self.inner
            .parent()
            .iter()
            .map(|p| p.map_or(-1, |p| p as i64))
            .collect()
    }

    /// Breadth-first order, parents first.
    #[getter]
    fn order(&self) -> Vec<usize> {
        self.inner.order().to_vec()
    }

    /// Mutual information of every pair, in pair order.
    #[getter]
    fn pair_mi(&self) -> Vec<f64> {
        self.inner.pair_mi().to_vec()
    }

    #[getter]
    fn n_parameters(&self) -> u64 {
        self.inner.n_parameters()
    }

    /// Column `c`'s kept counts as little-endian u64 bytes (root: marginal; child: parent x child).
    fn counts<'py>(&self, py: Python<'py>, c: usize) -> PyResult<Bound<'py, PyBytes>> {
        let counts = self
            .inner
            .counts()
            .get(c)
            .ok_or_else(|| to_py(Error::Invalid(format!("no column {c}"))))?;
        le_bytes(py, &[counts])
    }

    /// The edges in breadth-first order.
    fn edges(&self) -> Vec<EdgeTuple> {
        let parent = self.inner.parent();
        self.inner
            .order()
            .iter()
            .filter_map(|&c| {
                let p = parent[c]?;
                let w = self.inner.edge_weight(c)?;
                Some((p, c, w.mutual_info, w.g_statistic, w.dof, w.p_value))
            })
            .collect()
    }

    /// Scores a batch with the model's columns: (ln p per row as f64 bytes, per-column
    /// surprisal bytes or None, per-column count of values without a code). Refused when the
    /// results would pass `memory_limit` bytes (None: no limit).
    #[allow(clippy::type_complexity)]
    #[pyo3(signature = (batch, surprisal, memory_limit = None))]
    fn score<'py>(
        &self,
        py: Python<'py>,
        batch: &Bound<'py, PyAny>,
        surprisal: bool,
        memory_limit: Option<u64>,
    ) -> PyResult<(
        Bound<'py, PyBytes>,
        Option<Vec<Bound<'py, PyBytes>>>,
        Vec<u64>,
    )> {
        let batch = import_batch(batch)?;
        let model = &self.inner;
        let d = model.codebook().columns().len();
        let needed = memory::score_bytes(d, batch.num_rows(), SLICE_ROWS, surprisal);
        memory::check(
            &format!("scoring {} rows", batch.num_rows()),
            // The results are copied once into Python bytes.
            &[
                ("scores and codes", needed),
                ("their copy for Python", needed),
            ],
            memory_limit,
            "score fewer rows at a time (smaller batches), or without surprisal",
        )
        .map_err(to_py)?;
        let mut scored = Scored::default();
        for slice in slices(&batch) {
            let part = detached(py, || model.score(&slice, surprisal))?;
            scored.append(part);
            py.check_signals()?;
        }
        let columns = match scored.surprisal {
            Some(cols) => Some(
                cols.iter()
                    .map(|c| le_bytes(py, &[c]))
                    .collect::<PyResult<_>>()?,
            ),
            None => None,
        };
        Ok((le_bytes(py, &[&scored.total])?, columns, scored.unseen))
    }

    /// Samples `count` rows from row `start` of the stream of `seed`: (u16 codes, column after
    /// column, as bytes; per column the f64 bytes of the numbers drawn in numeric bins, or None;
    /// per column the u32 bytes of the tail entries drawn behind "other", or None). Refused
    /// when the rows would pass `memory_limit` bytes (None: no limit).
    #[pyo3(signature = (start, count, seed, memory_limit = None))]
    fn sample<'py>(
        &self,
        py: Python<'py>,
        start: u64,
        count: usize,
        seed: u64,
        memory_limit: Option<u64>,
    ) -> PyResult<SampledBytes<'py>> {
        let model = &self.inner;
        let rows = memory::sample_bytes(model.codebook(), count);
        memory::check(
            &format!("sampling {count} rows"),
            &[("sampled rows", rows), ("their copy for Python", rows)],
            memory_limit,
            "sample fewer rows at a time (smaller batch_rows, or sample_to_parquet)",
        )
        .map_err(to_py)?;
        // SLICE_ROWS is a multiple of the sampling block, so the rows do not change.
        let mut sampled = Sampled::default();
        // At least one call, so that even 0 rows come back with every column.
        for offset in (0..count.max(1)).step_by(SLICE_ROWS) {
            let n = SLICE_ROWS.min(count - offset);
            let part = detached(py, || model.sample(start + offset as u64, n, seed))?;
            sampled.append(part);
            py.check_signals()?;
        }
        let (codes, floats) = codes_and_floats(py, &sampled.codes, &sampled.floats)?;
        let tails = sampled
            .tails
            .iter()
            .map(|t| t.as_ref().map(|t| le_bytes(py, &[t])).transpose())
            .collect::<PyResult<_>>()?;
        Ok((codes, floats, tails))
    }
}
