//! The one error type of the core. The bindings map each variant to its own Python exception class.

/// Every failure the core can report. Each message says what was wrong, where, and what to do.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The input data itself is unusable (empty, unsupported type, all-null column, bad value).
    #[error("{0}")]
    Data(String),
    /// The data does not match the expected columns or types (a fitted codebook, an earlier batch).
    #[error("{0}")]
    Schema(String),
    /// A column has more categories than the codes can hold.
    #[error("{0}")]
    TooManyCategories(String),
    /// A model or statistics file is damaged, hostile or of an unknown version.
    #[error("{0}")]
    CorruptModel(String),
    /// The work would pass a memory or size limit.
    #[error("{0}")]
    ResourceLimit(String),
    /// The work would pass the memory limit in force (`memory`).
    #[error("{0}")]
    MemoryLimit(String),
    /// An interrupt (Ctrl-C) stopped the call; see `cancel`.
    #[error("interrupted")]
    Cancelled,
    /// A caller broke an invariant of the API (wrong lengths, mismatched shapes).
    #[error("{0}")]
    Invalid(String),
}

/// The core's result type.
pub type Result<T> = std::result::Result<T, Error>;
