//! treewise's own rayon pool, sized by TREEWISE_THREADS (default: all cores).

use std::sync::OnceLock;

use pyo3::exceptions::PyValueError;
use pyo3::PyResult;
use rayon::{ThreadPool, ThreadPoolBuilder};

static POOL: OnceLock<Result<ThreadPool, String>> = OnceLock::new();

fn build() -> Result<ThreadPool, String> {
    let threads = match std::env::var("TREEWISE_THREADS") {
        Ok(v) => match v.trim().parse::<usize>() {
            Ok(n) if n >= 1 => n,
            _ => {
                return Err(format!(
                    "TREEWISE_THREADS must be a whole number of at least 1, got {v:?}; unset it to use every core"
                ))
            }
        },
        Err(_) => 0, // rayon's default: one thread per core
    };
    ThreadPoolBuilder::new()
        .num_threads(threads)
        .thread_name(|i| format!("treewise-{i}"))
        .build()
        .map_err(|e| format!("could not start treewise's thread pool: {e}"))
}

/// The pool, built on first use.
pub fn pool() -> PyResult<&'static ThreadPool> {
    POOL.get_or_init(build)
        .as_ref()
        .map_err(|e| PyValueError::new_err(e.clone()))
}
