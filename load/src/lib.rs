//! # apportion-load
//!
//! Synthetic inputs for apportion, with and without a known answer.
//!
//! - A **ground-truth scenario** ([`scenario`], [`simulate`]): seeded
//!   journeys in which every channel has a known effect on the probability of
//!   converting, including channels that are shown often and do nothing and
//!   one that is targeted at users who would convert anyway. The simulator
//!   writes input events and the true effect of every channel.
//! - **Scoring** ([`groundtruth`]): every model's credit per channel compared
//!   with the truth (Spearman's rank correlation, credit given to channels
//!   that do nothing).
//! - A **load generator** ([`gen`]): the same journeys at scale (10M+ lines),
//!   streamed to a file in time order or not.
//!
//! Why a simulator at all: observational credit cannot be checked against
//! real data, where nobody knows what each channel caused. A simulation
//! with a known causal structure shows which models recover it and where all
//! of them fail (channels that ride along, targeting). It says nothing about
//! any real channel. The generative model is written down in load/README.md.
//!
//! ## Layout
//! - `scenario.rs`: the generative model and the invented shop's channels.
//! - `simulate.rs`: one journey per user, events and [`simulate::Truth`].
//! - `groundtruth.rs`: crediting (binary or in process) and scoring.
//! - `gen.rs`: the streaming load generator.
//! - `floors.rs`: borrowed-parse and HMAC rates on the same records (benchmark
//!   orientation).
//! - `lift.rs`: simulated lift tests (true incremental conversions of one
//!   channel and the standard error of an idealized experiment).
//! - `lines.rs`, `timefmt.rs`: fast NDJSON and RFC 3339 writing.
//! - `stats.rs`: average ranks, Spearman, mean and standard deviation.
//! - `main.rs`: the `apportion-load` command line.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod floors;
pub mod gen;
pub mod groundtruth;
pub mod lift;
pub mod lines;
pub mod scenario;
pub mod simulate;
pub mod stats;
pub mod timefmt;

/// Errors of this crate.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LoadError {
    /// The scenario is not well formed.
    #[error("invalid scenario: {0}")]
    Scenario(String),
    /// Reading or writing failed.
    #[error(transparent)]
    Io(#[from] std::io::Error),
    /// A JSON document could not be read or written.
    #[error(transparent)]
    Json(#[from] serde_json::Error),
    /// Running `apportion replay` failed.
    #[error("replay failed: {0}")]
    Replay(String),
}
