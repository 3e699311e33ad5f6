//! treewise's own rayon pool, sized by TREEWISE_THREADS (default: all cores), rebuilt after a fork.

use std::sync::Mutex;

use pyo3::exceptions::{PyRuntimeError, PyValueError};
use pyo3::PyResult;
use rayon::{ThreadPool, ThreadPoolBuilder};

/// The pool and the process that built it. A forked child inherits the pool but none of its
/// threads, so work sent to it would wait forever: a child builds its own pool instead.
static POOL: Mutex<Option<(u32, &'static ThreadPool)>> = Mutex::new(None);

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

/// The pool of this process, built on first use (and again in a forked child).
pub fn pool() -> PyResult<&'static ThreadPool> {
    let pid = std::process::id();
    let mut slot = POOL
        .lock()
        .map_err(|_| PyRuntimeError::new_err("treewise's thread pool lock is poisoned"))?;
    if let Some((owner, pool)) = *slot {
        if owner == pid {
            return Ok(pool);
        }
    }
    // The parent's pool (if any) is left alone: its threads do not exist in this process.
    let pool: &'static ThreadPool = Box::leak(Box::new(build().map_err(PyValueError::new_err)?));
    *slot = Some((pid, pool));
    Ok(pool)
}
