//! treewise._core: thin pyo3 bindings over treewise-core (type conversion, GIL release, errors).

mod arrow_import;
mod buffers;
mod codebook;
mod codebook_builder;
mod errors;
mod infer;
mod mixture;
mod mixture_stats;
mod model;
mod one_pass;
mod pair_stats;
mod threads;

use arrow_array::RecordBatch;
use pyo3::prelude::*;

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
    m.add_class::<codebook_builder::PyCodebookBuilder>()?;
    m.add_class::<codebook::PyCodebook>()?;
    m.add_class::<pair_stats::PyPairStats>()?;
    m.add_class::<one_pass::PyOnePass>()?;
    m.add("PROVISIONAL_CODES", treewise_core::tally::PROVISIONAL_CODES)?;
    m.add_class::<model::PyTreeModel>()?;
    m.add_class::<infer::PyTreeInference>()?;
    m.add_class::<mixture::PyMixtureCodes>()?;
    m.add_class::<mixture::PyMixtureComponent>()?;
    m.add("SAMPLE_BLOCK", treewise_core::model::SAMPLE_BLOCK)?;
    m.add_function(wrap_pyfunction!(mixture::mixture_sample, m)?)?;
    m.add_function(wrap_pyfunction!(mixture_stats::mixture_sums_len, m)?)?;
    m.add_function(wrap_pyfunction!(mixture_stats::mixture_add_sums, m)?)?;
    m.add_function(wrap_pyfunction!(mixture_stats::mixture_fit_sums, m)?)?;
    m.add_function(wrap_pyfunction!(chi2_sf, m)?)?;
    m.add_function(wrap_pyfunction!(thread_count, m)?)?;
    m.add("DEBUG_BUILD", cfg!(debug_assertions))?;
    Ok(())
}
