//! Error mapping and the one helper that runs long work with the GIL released.

use std::panic::{catch_unwind, AssertUnwindSafe};

use pyo3::exceptions::PyRuntimeError;
use pyo3::prelude::*;
use pyo3::types::PyString;
use pyo3::Python;
use treewise_core::Error;

use crate::threads;

/// The Python class (in `treewise.errors`) for each kind of core error.
fn class_name(e: &Error) -> &'static str {
    match e {
        Error::Data(_) => "DataError",
        Error::Schema(_) => "SchemaError",
        Error::TooManyCategories(_) => "TooManyCategoriesError",
        Error::CorruptModel(_) => "CorruptModelError",
        Error::ResourceLimit(_) => "ResourceLimitError",
        Error::Invalid(_) => "TreewiseError",
    }
}

/// Converts a core error to an instance of its `treewise.errors` class.
pub fn to_py(e: Error) -> PyErr {
    Python::attach(|py| {
        let message = e.to_string();
        let made = py
            .import("treewise.errors")
            .and_then(|m| m.getattr(class_name(&e)))
            .and_then(|cls| cls.call1((PyString::new(py, &message),)));
        match made {
            Ok(instance) => PyErr::from_value(instance),
            Err(_) => PyRuntimeError::new_err(message),
        }
    })
}

/// Runs `f` on treewise's thread pool with the GIL released. A core error becomes its Python
/// class; a panic becomes a `TreewiseError` that asks for a report, never a `PanicException`.
pub fn detached<T, F>(py: Python<'_>, f: F) -> PyResult<T>
where
    F: FnOnce() -> Result<T, Error> + Send,
    T: Send,
{
    let pool = threads::pool()?;
    let outcome = py.detach(|| catch_unwind(AssertUnwindSafe(|| pool.install(f))));
    match outcome {
        Ok(result) => result.map_err(to_py),
        Err(payload) => {
            let what = payload
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| payload.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "unknown panic".to_string());
            Err(to_py(Error::Invalid(format!(
                "internal error in treewise's Rust core ({what}); this is a bug, please report it \
                 with the data shape that triggered it"
            ))))
        }
    }
}
