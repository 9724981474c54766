//! # apportion-report
//!
//! Compares attribution models on the rows apportion already writes: which
//! channels (or campaigns) gain or lose credit when one model replaces
//! another, by how much, and how sure we can be. Nothing here needs the
//! service running; `apportion compare` reads credit and path rows from
//! NDJSON files or Parquet directories, and `serve` can feed the same
//! accumulator as it credits.
//!
//! ## Layout
//! - [`rows`]: the few fields of credit and path rows this crate reads
//!   ([`CreditRecord`], [`PathRecord`]) and the readers: one NDJSON file, a
//!   directory of rotated `credit-NNNNNN.ndjson` / `paths-NNNNNN.ndjson`
//!   files (`*.partial` ignored), Parquet files or the Parquet sink's
//!   date-partitioned tree (`credit/date=YYYY-MM-DD/*.parquet`).
//! - [`compare`]: [`Comparison`], an accumulator fed one conversion's rows
//!   at a time: credited conversions and value per key and model,
//!   differences from a baseline model, and the shift matrix of every pair
//!   of models; with experiments, the credit each model gives a tested
//!   channel in the tested period.
//! - [`bootstrap`]: percentile intervals for the channel shares of the
//!   data-driven models, refitted on resampled closed paths.
//! - [`lift`]: the experiments file (measured incremental conversions) and
//!   the check of model credit against it.
//! - [`report`]: the whole report ([`Report`]) assembled from the parts,
//!   with its cautions.
//! - [`render`]: the report as a text table, CSV, JSON or one
//!   self-contained HTML page with SVG charts.
//! - `exact` (private): order-free sums.
//!
//! ## Design decisions
//!
//! **Own row structs.** The crate deserializes only the fields it needs
//! into its own [`CreditRecord`] and [`PathRecord`] rather than the
//! engine's output types. The contract's field names are the interface;
//! where a Rust type lives is not, and a reader that ignores unknown
//! fields keeps working when rows gain columns.
//!
//! **An accumulator, fed per conversion.** The shift matrix is defined per
//! conversion (below), so the unit of input is one conversion's rows under
//! every model. The batch command groups rows by `conversion_id` and feeds
//! the groups; `serve` can feed each conversion as it credits it and answer
//! `GET /v1/compare` from [`Comparison::result`] without keeping rows.
//!
//! **Order-free, exact sums.** Every total is a sum of fixed-point integers
//! (2^-64 units in an `i128`), so it does not depend on the order in which
//! conversions arrive: the batch command, a streaming feed and a Parquet
//! tree read in date order give bit-identical numbers and identical JSON.
//!
//! **The shift matrix.** For models A and B and one conversion, let `a_k`
//! and `b_k` be the credit each gives key k (its touches' credit summed),
//! and `d_k = b_k - a_k`. Key k keeps `min(a_k, b_k)` (the diagonal). The
//! credit a losing key gives up, `-d_i`, goes to the gaining keys in
//! proportion to their gains: `flow(i -> j) = (-d_i) * d_j / G` with
//! `G = sum of positive d`. Summed over conversions, row i of the matrix
//! adds up to key i's total under A and column j to key j's total under B.
//! Within one conversion nothing is assumed about which touch "caused" the
//! move; the proportional rule is the simplest one that preserves both
//! margins.
//!
//! **Data-driven shares and their uncertainty.** For a fitted model and a
//! set of closed paths, the share of channel c is the model's credit to c
//! summed over the converting paths (each conversion's credit sums to 1),
//! divided by the number of converting paths: exactly what the model's
//! credit rows would add up to per channel over those conversions, had one
//! snapshot credited them all. The bootstrap resamples closed paths with
//! replacement, refits `shapley` and `markov` on each resample with the
//! engine's own code ([`apportion_engine::datadriven`]), recomputes the
//! shares and reports percentile intervals. Paths are resampled, not
//! users, and an interval measures how stable the fit is, not whether the
//! credit is causal; the report says so.
//!
//! **Pure and seeded.** Resample b draws from ChaCha8 seeded with the seed
//! and stream b, so the result is the same whatever the number of threads.
//! Threads (`std::thread::scope`) live here, never in the engine.
//!
//! **Charts without a chart library.** The HTML page writes its SVG
//! directly: a few hundred lines instead of a plotting dependency, no
//! script, no font or file fetched, so the page opens offline. Every chart
//! has a data table under it whose numeric cells name the JSON value they
//! show (`data-path`, a JSON pointer into the JSON report).
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod bootstrap;
pub mod compare;
mod exact;
pub mod lift;
pub mod render;
pub mod report;
pub mod rows;

pub use bootstrap::{bootstrap, BootstrapOptions, BootstrapResult};
pub use compare::{CompareOptions, Comparison, ComparisonResult, GroupBy};
pub use lift::{parse_experiments, Experiment};
pub use report::{build_report, Report, ReportInputs};
pub use rows::{read_credit, read_paths, CreditRecord, PathRecord};

/// Errors of this crate.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ReportError {
    /// Reading a file failed.
    #[error("{path}: {error}")]
    Io {
        /// The file or directory.
        path: String,
        /// The error (in the message, not chained, so it is said once).
        error: std::io::Error,
    },
    /// A row could not be read.
    #[error("{path}: row {row}: {detail}")]
    Row {
        /// The file.
        path: String,
        /// 1-based line (NDJSON) or row (Parquet) number.
        row: u64,
        /// What is wrong.
        detail: String,
    },
    /// A Parquet file could not be read.
    #[error("{path}: {detail}")]
    Parquet {
        /// The file.
        path: String,
        /// What is wrong.
        detail: String,
    },
    /// A path given on the command line holds nothing to read.
    #[error("{0}")]
    NoInput(String),
    /// A line of the experiments file is wrong.
    #[error("{path}: line {line}: {detail}")]
    Experiment {
        /// The experiments file.
        path: String,
        /// 1-based line number.
        line: u64,
        /// What is wrong.
        detail: String,
    },
    /// Options that cannot work together or with the input.
    #[error("{0}")]
    Invalid(String),
}
