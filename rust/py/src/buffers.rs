//! Numbers to Python bytes in little-endian order, written straight into the bytes object.

use pyo3::prelude::*;
use pyo3::types::PyBytes;

/// A number with a fixed-size little-endian encoding.
pub trait LeBytes: Copy {
    const SIZE: usize;
    fn write_le(self, out: &mut [u8]);
}

macro_rules! le_bytes {
    ($($t:ty),*) => {$(
        impl LeBytes for $t {
            const SIZE: usize = std::mem::size_of::<$t>();
            #[inline]
            fn write_le(self, out: &mut [u8]) {
                out.copy_from_slice(&self.to_le_bytes());
            }
        }
    )*};
}
le_bytes!(u16, u32, u64, f64);

/// The concatenation of `parts` as one bytes object (numpy reads it with `np.frombuffer`).
pub fn le_bytes<'py, T: LeBytes>(py: Python<'py>, parts: &[&[T]]) -> PyResult<Bound<'py, PyBytes>> {
    let len = parts.iter().map(|p| p.len() * T::SIZE).sum();
    PyBytes::new_with(py, len, |buf| {
        let mut chunks = buf.chunks_exact_mut(T::SIZE);
        for part in parts {
            // The part drives the zip: a zip stops on its first side's end, so the chunks
            // must come second or one would be skipped between parts.
            for (v, dst) in part.iter().zip(chunks.by_ref()) {
                v.write_le(dst);
            }
        }
        Ok(())
    })
}

/// Rows of codes (u16, column after column, as one bytes object) with, per column, the f64 bytes
/// of the numbers placed in float bins, or None.
pub type CodesAndFloats<'py> = (Bound<'py, PyBytes>, Vec<Option<Bound<'py, PyBytes>>>);

/// Codes and float numbers, column by column, as [`CodesAndFloats`].
pub fn codes_and_floats<'py>(
    py: Python<'py>,
    codes: &[Vec<u16>],
    floats: &[Option<Vec<f64>>],
) -> PyResult<CodesAndFloats<'py>> {
    let parts: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
    let floats = floats
        .iter()
        .map(|v| v.as_ref().map(|v| le_bytes(py, &[v])).transpose())
        .collect::<PyResult<_>>()?;
    Ok((le_bytes(py, &parts)?, floats))
}
