//! Error mapping and the one helper that runs long work with the GIL released.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::mpsc::{sync_channel, RecvTimeoutError};
use std::time::Duration;

use pyo3::exceptions::{PyKeyboardInterrupt, PyRuntimeError};
use pyo3::prelude::*;
use pyo3::types::PyString;
use pyo3::Python;
use treewise_core::{cancel, Error};

use crate::threads;

/// How often a waiting call takes the GIL back to run Python's signal handlers (Ctrl-C).
const SIGNAL_POLL: Duration = Duration::from_millis(50);

/// The Python class (in `treewise.errors`) for each kind of core error.
fn class_name(e: &Error) -> &'static str {
    match e {
        Error::Data(_) => "DataError",
        Error::Schema(_) => "SchemaError",
        Error::TooManyCategories(_) => "TooManyCategoriesError",
        Error::CorruptModel(_) => "CorruptModelError",
        Error::ResourceLimit(_) => "ResourceLimitError",
        Error::MemoryLimit(_) => "MemoryLimitError",
        Error::Invalid(_) | Error::Cancelled => "TreewiseError",
    }
}

/// Converts a core error to an instance of its `treewise.errors` class. A call cancelled by an
/// interrupt (Ctrl-C on another call) is a KeyboardInterrupt.
pub fn to_py(e: Error) -> PyErr {
    if matches!(e, Error::Cancelled) {
        return PyKeyboardInterrupt::new_err("interrupted");
    }
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

/// The outcome of `f` on the pool: its result, or the payload of its panic.
type Outcome<T> = std::thread::Result<Result<T, Error>>;

/// Runs `f` on treewise's thread pool with the GIL released, and stays interruptible: while `f`
/// runs, this thread takes the GIL back every [`SIGNAL_POLL`] to run Python's signal handlers.
/// When one raises (Ctrl-C: KeyboardInterrupt), the core's cancellation epoch moves, `f` stops
/// at its next check (`treewise_core::cancel`) and that exception is returned. A core error
/// becomes its Python class; a panic becomes a `TreewiseError` that asks for a report, never a
/// `PanicException`.
pub fn detached<T, F>(py: Python<'_>, f: F) -> PyResult<T>
where
    F: FnOnce() -> Result<T, Error> + Send,
    T: Send,
{
    let pool = threads::pool()?;
    let token = cancel::Token::new();
    let mut interrupted: Option<PyErr> = None;
    let outcome: Option<Outcome<T>> = py.detach(|| {
        let (tx, rx) = sync_channel::<Outcome<T>>(1);
        pool.in_place_scope(|scope| {
            // The work runs on a pool thread, like `pool.install` would run it, so the thread
            // count and every result stay the same.
            scope.spawn(move |_| {
                let outcome = catch_unwind(AssertUnwindSafe(|| token.run(f)));
                // The receiver waits until it gets this or the sender is dropped.
                let _ = tx.send(outcome);
            });
            loop {
                match rx.recv_timeout(SIGNAL_POLL) {
                    Ok(outcome) => return Some(outcome),
                    Err(RecvTimeoutError::Disconnected) => return None,
                    Err(RecvTimeoutError::Timeout) if interrupted.is_none() => {
                        if let Err(e) = Python::attach(|py| py.check_signals()) {
                            interrupted = Some(e);
                            cancel::interrupt();
                        }
                    }
                    // Interrupted already: wait for `f` to notice and return.
                    Err(RecvTimeoutError::Timeout) => {}
                }
            }
        })
    });
    if let Some(e) = interrupted {
        return Err(e);
    }
    match outcome {
        Some(Ok(result)) => result.map_err(to_py),
        Some(Err(payload)) => {
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
        None => Err(to_py(Error::Invalid(
            "internal error: treewise's worker stopped without a result; this is a bug, please \
             report it"
                .into(),
        ))),
    }
}
