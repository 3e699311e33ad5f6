//! The PairStats class: exact pair counts, updated batch by batch, merged, and as bytes.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::{memory, PairStats};

use crate::arrow_import::import_batch;
use crate::buffers::le_bytes;
use crate::codebook::PyCodebook;
use crate::errors::{detached, to_py};
use crate::{slices, threads, SLICE_ROWS};

/// Exact pair counts over one codebook's codes.
#[pyclass(name = "PairStats", module = "treewise._core")]
pub(crate) struct PyPairStats {
    pub(crate) inner: PairStats,
    /// An interrupt stopped an update mid-batch: the tables may hold part of that batch.
    pub(crate) interrupted: bool,
}

#[pymethods]
impl PyPairStats {
    /// Zero counts over `codebook`'s codes; refused when they, the scratch of counting a batch
    /// and the model's tail tables would pass `memory_limit` bytes (None: no limit).
    #[new]
    #[pyo3(signature = (codebook, memory_limit = None))]
    fn new(codebook: &PyCodebook, memory_limit: Option<u64>) -> PyResult<Self> {
        let cards = codebook.inner.cardinalities();
        let threads = threads::pool()?.current_num_threads();
        let tails = memory::tail_table_bytes(&codebook.inner);
        memory::check_fit(&cards, SLICE_ROWS, threads, tails, memory_limit).map_err(to_py)?;
        let inner = PairStats::new(cards).map_err(to_py)?;
        Ok(PyPairStats::whole(inner))
    }

    /// Encodes one Arrow record batch with `codebook` and adds its counts.
    fn update(
        &mut self,
        py: Python<'_>,
        codebook: &PyCodebook,
        batch: &Bound<'_, PyAny>,
    ) -> PyResult<()> {
        let batch = import_batch(batch)?;
        self.counts()?;
        let stats = &mut self.inner;
        let codebook = &codebook.inner;
        for slice in slices(&batch) {
            let counted = detached(py, || {
                let codes = codebook.encode(&slice, true)?;
                stats.add_codes(&codes)
            });
            if let Err(e) = counted {
                self.interrupted = is_interrupt(py, &e);
                return Err(e);
            }
            // A slice done: its counts are whole, so a signal here leaves them consistent.
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
        if codebook.inner.cardinalities() != self.counts()?.cardinalities() {
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
            PyPairStats::whole(stats),
        ))
    }

    /// The counts of a CSR matrix's rows from its non-zero entries alone: `indptr` (u64),
    /// `indices` (u32, sorted within each row) and `codes` (u16, each entry's code in its
    /// column) as little-endian bytes; `zero[c]` is column c's code of 0 (None: no zeros).
    #[staticmethod]
    #[pyo3(signature = (codebook, n_rows, indptr, indices, codes, zero, memory_limit = None))]
    #[allow(clippy::too_many_arguments)]
    fn from_csr(
        py: Python<'_>,
        codebook: &PyCodebook,
        n_rows: usize,
        indptr: &[u8],
        indices: &[u8],
        codes: &[u8],
        zero: Vec<Option<u16>>,
        memory_limit: Option<u64>,
    ) -> PyResult<Self> {
        let cards = codebook.inner.cardinalities();
        let threads = threads::pool()?.current_num_threads();
        // Each thread holds its own copy of the tables while it counts.
        let tables = memory::pair_stats_bytes(&cards).saturating_mul(threads as u64 + 1);
        memory::check(
            &format!("counting the pairs of {} sparse columns", cards.len()),
            &[("pair statistics, one copy per thread", tables)],
            memory_limit,
            memory::FIT_ADVICE,
        )
        .map_err(to_py)?;
        let words = |b: &[u8], w: usize| -> PyResult<()> {
            if b.len().is_multiple_of(w) {
                Ok(())
            } else {
                Err(to_py(treewise_core::Error::Invalid(
                    "sparse input: a buffer is not whole words".into(),
                )))
            }
        };
        words(indptr, 8)?;
        words(indices, 4)?;
        words(codes, 2)?;
        let indptr: Vec<u64> = indptr
            .chunks_exact(8)
            .map(|c| u64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
            .collect();
        let indices: Vec<u32> = indices
            .chunks_exact(4)
            .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect();
        let codes: Vec<u16> = codes
            .chunks_exact(2)
            .map(|c| u16::from_le_bytes([c[0], c[1]]))
            .collect();
        let inner = detached(py, || {
            treewise_core::kernels::count_csr(&treewise_core::kernels::CsrCodes {
                n_rows,
                cards: &cards,
                zero: &zero,
                indptr: &indptr,
                indices: &indices,
                codes: &codes,
            })
        })?;
        Ok(PyPairStats::whole(inner))
    }

    /// An independent copy of these counts.
    fn copy(&self) -> PyResult<PyPairStats> {
        Ok(PyPairStats::whole(self.counts()?.clone()))
    }

    fn __eq__(&self, other: &PyPairStats) -> bool {
        self.inner == other.inner
    }

    /// Adds another PairStats' counts to these.
    fn merge(&mut self, py: Python<'_>, other: &PyPairStats) -> PyResult<()> {
        self.counts()?;
        let other = other.counts()?;
        let stats = &mut self.inner;
        let merged = detached(py, || stats.merge(other));
        if let Err(e) = &merged {
            self.interrupted = is_interrupt(py, e);
        }
        merged
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
        le_bytes(py, &[self.counts()?.marginal(i)])
    }

    /// The table of columns i < j (row-major r_i x r_j), as little-endian u64 bytes.
    fn table<'py>(&self, py: Python<'py>, i: usize, j: usize) -> PyResult<Bound<'py, PyBytes>> {
        let d = self.inner.n_columns();
        if i >= j || j >= d {
            return Err(to_py(treewise_core::Error::Invalid(format!(
                "a table needs columns i < j < {d}, got ({i}, {j})"
            ))));
        }
        le_bytes(py, &[self.counts()?.table(i, j)])
    }
}

impl PyPairStats {
    pub(crate) fn whole(inner: PairStats) -> Self {
        PyPairStats {
            inner,
            interrupted: false,
        }
    }

    /// The counts, unless an interrupt left them holding part of a batch.
    pub(crate) fn counts(&self) -> PyResult<&PairStats> {
        if self.interrupted {
            return Err(to_py(treewise_core::Error::Invalid(
                "these pair statistics were interrupted in the middle of a batch and may hold \
                 part of it; count the data again into new PairStats"
                    .into(),
            )));
        }
        Ok(&self.inner)
    }
}

/// Whether `e` is an interrupt (Ctrl-C), after which counts may hold part of a batch.
pub(crate) fn is_interrupt(py: Python<'_>, e: &PyErr) -> bool {
    e.is_instance_of::<pyo3::exceptions::PyKeyboardInterrupt>(py)
}
