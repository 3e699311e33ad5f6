//! Cooperative cancellation: a process-wide epoch that an interrupt moves, checked by long loops.
//!
//! A core call runs under a [`Token`], which records the epoch when the call starts. Its long
//! loops ask the token (`token.check()?`, once per block of rows or per pair, never per row)
//! and stop with [`Error::Cancelled`] once the epoch has moved. [`interrupt`] moves it, which
//! cancels every core call running at that moment: that is what Ctrl-C means. A call that starts
//! afterwards records the new epoch and runs normally.
//!
//! The token reaches code that has no parameter for it through a thread-local, set by
//! [`Token::run`] on the thread that starts the call. Rayon's workers do not inherit
//! thread-locals, so a parallel loop takes `let token = cancel::current();` before it starts
//! and moves the token into its closures. Code that runs outside any [`Token::run`] (plain Rust
//! callers, unit tests) gets a token from the epoch of the moment it asks.
//!
//! One imprecision is accepted: a pool thread that waits inside one call's parallel loop may run
//! a job of another call, and a `cancel::current()` taken inside that job reads the first call's
//! token. It can only cancel a call that started after an interrupt while an older call was still
//! winding down, and only when two Python threads run core calls at once.

use std::cell::Cell;
use std::sync::atomic::{AtomicU64, Ordering};

use crate::error::{Error, Result};

/// The number of interrupts so far in this process.
static EPOCH: AtomicU64 = AtomicU64::new(0);

thread_local! {
    /// The token of the call running on this thread, if it was started with [`Token::run`].
    static CURRENT: Cell<Option<Token>> = const { Cell::new(None) };
}

/// One core call's view of the epoch: cancelled once the epoch is not the one it started in.
#[derive(Clone, Copy, Debug)]
pub struct Token {
    /// The epoch this token watches: the process-wide one, or a test's own.
    epoch: &'static AtomicU64,
    start: u64,
}

impl PartialEq for Token {
    fn eq(&self, other: &Token) -> bool {
        std::ptr::eq(self.epoch, other.epoch) && self.start == other.start
    }
}

impl Default for Token {
    fn default() -> Self {
        Token::new()
    }
}

impl Token {
    /// A token for a call that starts now.
    pub fn new() -> Token {
        Token::watching(&EPOCH)
    }

    /// A token for a call that starts now, watching `epoch`.
    fn watching(epoch: &'static AtomicU64) -> Token {
        Token {
            epoch,
            start: epoch.load(Ordering::Acquire),
        }
    }

    /// A token with an epoch of its own and the function that moves it: lets a test cancel
    /// one call without touching the other tests running in the same process.
    #[cfg(test)]
    pub(crate) fn isolated() -> (Token, impl Fn()) {
        let epoch: &'static AtomicU64 = Box::leak(Box::new(AtomicU64::new(0)));
        (Token::watching(epoch), move || {
            epoch.fetch_add(1, Ordering::AcqRel);
        })
    }

    /// Whether an interrupt came after this call started (one atomic load).
    #[inline]
    pub fn cancelled(self) -> bool {
        self.epoch.load(Ordering::Relaxed) != self.start
    }

    /// `Err(Error::Cancelled)` once an interrupt came after this call started.
    #[inline]
    pub fn check(self) -> Result<()> {
        if self.cancelled() {
            Err(Error::Cancelled)
        } else {
            Ok(())
        }
    }

    /// Runs `f` on this thread with this token as the [`current`] one, then restores the one
    /// before (also when `f` unwinds).
    pub fn run<T>(self, f: impl FnOnce() -> T) -> T {
        struct Restore(Option<Token>);
        impl Drop for Restore {
            fn drop(&mut self) {
                CURRENT.with(|c| c.set(self.0));
            }
        }
        let _restore = Restore(CURRENT.with(|c| c.replace(Some(self))));
        f()
    }
}

/// The token of the call running on this thread (see the module notes on rayon's workers).
#[inline]
pub fn current() -> Token {
    CURRENT.with(Cell::get).unwrap_or_default()
}

/// Cancels every core call running now; calls that start afterwards are not affected.
pub fn interrupt() {
    EPOCH.fetch_add(1, Ordering::AcqRel);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_interrupt_cancels_running_calls_but_not_later_ones() {
        let (token, interrupt) = Token::isolated();
        token.run(|| {
            assert_eq!(current(), token);
            assert!(current().check().is_ok());
            interrupt();
            assert!(matches!(current().check(), Err(Error::Cancelled)));
            // A call that starts after the interrupt runs normally.
            let later = Token::watching(token.epoch);
            assert!(later.check().is_ok());
        });
        assert!(token.cancelled());
        // Outside `run`, the thread has no token of its own again.
        assert!(current() != token);
    }

    /// `d` columns of `n` codes below `r`, from a fixed generator.
    fn table(d: usize, n: usize, r: u64) -> Vec<Vec<u16>> {
        let mut rng = crate::rng::Rng::new(7, 0);
        (0..d)
            .map(|_| (0..n).map(|_| (rng.next_u64() % r) as u16).collect())
            .collect()
    }

    #[test]
    fn every_kernel_stops_at_a_moved_epoch_before_changing_counts() -> Result<()> {
        use crate::kernels::{count, Kernel};
        let codes = table(6, 5000, 4);
        let columns: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
        let cards = vec![4; 6];
        for kernel in [
            Kernel::Auto,
            Kernel::Bitset,
            Kernel::Histogram,
            Kernel::Sparse,
            Kernel::Naive,
        ] {
            let mut marginals = vec![vec![0u64; 4]; 6];
            let mut cells = vec![vec![0u64; 16]; 15];
            let mut tables: Vec<&mut [u64]> = cells.iter_mut().map(Vec::as_mut_slice).collect();
            let (token, interrupt) = Token::isolated();
            interrupt();
            let counted =
                token.run(|| count(&columns, &cards, &mut marginals, &mut tables, kernel));
            assert!(
                matches!(counted, Err(Error::Cancelled)),
                "{kernel:?}: {counted:?}"
            );
            assert!(marginals.iter().flatten().all(|&c| c == 0), "{kernel:?}");
            // The next call, under a fresh token, counts normally.
            let (fresh, _) = Token::isolated();
            fresh.run(|| count(&columns, &cards, &mut marginals, &mut tables, kernel))?;
            assert_eq!(marginals[0].iter().sum::<u64>(), 5000, "{kernel:?}");
        }
        Ok(())
    }

    #[test]
    fn a_moved_epoch_cancels_a_running_count() -> Result<()> {
        use crate::kernels::{count, Kernel};
        // The naive kernel over 120 columns of 2^20 rows: 7,140 pairs of a million increments,
        // minutes in a debug build, so the interrupt below lands while it runs.
        let (d, n) = (120, 1 << 20);
        let codes = table(d, n, 3);
        let columns: Vec<&[u16]> = codes.iter().map(Vec::as_slice).collect();
        let cards = vec![3; d];
        let mut marginals = vec![vec![0u64; 3]; d];
        let mut cells = vec![vec![0u64; 9]; d * (d - 1) / 2];
        let mut tables: Vec<&mut [u64]> = cells.iter_mut().map(Vec::as_mut_slice).collect();
        let (token, interrupt) = Token::isolated();
        let (started, wait) = std::sync::mpsc::channel();
        let counted = std::thread::scope(|s| {
            let worker = s.spawn(|| {
                token.run(|| {
                    let _ = started.send(());
                    count(&columns, &cards, &mut marginals, &mut tables, Kernel::Naive)
                })
            });
            let _ = wait.recv();
            std::thread::sleep(std::time::Duration::from_millis(100));
            interrupt();
            worker.join()
        });
        let counted = counted.map_err(|_| Error::Invalid("the counting thread panicked".into()))?;
        assert!(matches!(counted, Err(Error::Cancelled)), "{counted:?}");
        Ok(())
    }
}
