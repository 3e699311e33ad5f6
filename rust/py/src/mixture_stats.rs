//! Bindings for EM past memory: running weighted sums added batch by batch, and components
//! fitted from summed statistics.

use pyo3::prelude::*;
use pyo3::types::PyBytes;
use treewise_core::mixture;
use treewise_core::Error;

use crate::buffers::le_bytes;
use crate::errors::{detached, to_py};
use crate::mixture::{wrap, PyMixtureComponent};

/// Little-endian bytes as f64 or u16; a length that is not a whole number of values is an error.
fn f64s(data: &[u8], what: &str) -> PyResult<Vec<f64>> {
    whole(data, 8, what)?;
    Ok(data
        .chunks_exact(8)
        .map(|c| {
            let mut a = [0u8; 8];
            a.copy_from_slice(c);
            f64::from_le_bytes(a)
        })
        .collect())
}

fn u16s(data: &[u8], what: &str) -> PyResult<Vec<u16>> {
    whole(data, 2, what)?;
    Ok(data
        .chunks_exact(2)
        .map(|c| u16::from_le_bytes([c[0], c[1]]))
        .collect())
}

fn whole(data: &[u8], width: usize, what: &str) -> PyResult<()> {
    if data.len().is_multiple_of(width) {
        return Ok(());
    }
    Err(to_py(Error::Invalid(format!(
        "{what}: {} bytes is not a whole number of {width}-byte values",
        data.len()
    ))))
}

/// How many f64 the running weighted sums of `k` components over columns of `cards` hold.
#[pyfunction]
pub fn mixture_sums_len(cards: Vec<usize>, k: usize) -> PyResult<usize> {
    mixture::weighted_sums_len(&cards, k).map_err(to_py)
}

/// `sums` (f64 bytes; None for zeros) plus the weighted marginals and pair tables of the rows
/// given as code columns (u16 bytes, one per column, as `MixtureCodes.column` gives them) with
/// responsibilities `resp` (f64 bytes, rows x k). Returns the new sums; adding batch by batch
/// gives the same bits as adding every row at once (see `mixture::add_weighted_sums`).
#[pyfunction]
#[pyo3(signature = (columns, cards, resp, k, sums=None))]
pub fn mixture_add_sums<'py>(
    py: Python<'py>,
    columns: Vec<Bound<'py, PyBytes>>,
    cards: Vec<usize>,
    resp: &[u8],
    k: usize,
    sums: Option<&[u8]>,
) -> PyResult<Bound<'py, PyBytes>> {
    let codes = columns
        .iter()
        .map(|c| u16s(c.as_bytes(), "codes"))
        .collect::<PyResult<Vec<_>>>()?;
    let resp = f64s(resp, "responsibilities")?;
    let mut running = match sums {
        Some(bytes) => f64s(bytes, "weighted sums")?,
        None => vec![0.0; mixture::weighted_sums_len(&cards, k).map_err(to_py)?],
    };
    detached(py, || {
        mixture::add_weighted_sums(&mut running, &codes, &cards, &resp, k)
    })?;
    le_bytes(py, &[&running])
}

/// The M-step from summed statistics: per component, its Chow–Liu tree and tables smoothed by
/// `alpha` and pulled toward the pooled tables by `pooling` pseudo-rows (`mixture::fit_components`),
/// and its total weight (the sum of its responsibilities).
#[pyfunction]
pub fn mixture_fit_sums(
    py: Python<'_>,
    cards: Vec<usize>,
    sums: &[u8],
    k: usize,
    alpha: f64,
    pooling: f64,
) -> PyResult<(Vec<PyMixtureComponent>, Vec<f64>)> {
    let sums = f64s(sums, "weighted sums")?;
    if sums.iter().any(|s| !(s.is_finite() && *s >= 0.0)) {
        return Err(to_py(Error::Invalid(
            "weighted sums must be finite and non-negative".into(),
        )));
    }
    let (comps, totals) = detached(py, || {
        let stats = mixture::split_weighted_sums(&sums, &cards, k)?;
        let comps = mixture::fit_components(&cards, &stats, alpha, pooling)?;
        Ok((comps, stats.iter().map(|s| s.n).collect::<Vec<f64>>()))
    })?;
    Ok((wrap(comps), totals))
}
