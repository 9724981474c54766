//! Data-driven models (`shapley`, `markov`), fitted from closed paths.
//!
//! - [`stats`]: [`PathStats`], the counts both models are fitted from;
//!   incremental, mergeable, serde-able, with an order-free fingerprint that
//!   names every fitted snapshot (`model_version`).
//! - [`shapley`]: [`ShapleyModel`] and the generic exact / Monte Carlo
//!   Shapley routines ([`shapley_values`], [`shapley_monte_carlo`]).
//! - [`markov`]: [`MarkovModel`], removal effects in an absorbing chain of
//!   order 1..=4.
//! - `linalg` (private): absorbing-chain solvers (dense LU, sparse
//!   Gauss-Seidel with an error bound).
//!
//! Why fitted snapshots: a model is fitted once from a [`PathStats`] value
//! and then only read, so `replay` credits every conversion with one
//! snapshot and `serve` swaps snapshots on refit; both are `Send + Sync`.
//! Everything here is deterministic: same statistics, same numbers (Monte
//! Carlo only where asked, always from an explicit seed).

mod linalg;
pub mod markov;
pub mod shapley;
pub mod stats;

pub use markov::{MarkovChannel, MarkovExplanation, MarkovModel, SolveMethod, SolveReport};
pub use shapley::{
    shapley_monte_carlo, shapley_values, shapley_values_table, Coalition, GlobalChannelValue, GlobalShapley,
    ShapleyChannel, ShapleyEstimate, ShapleyExplanation, ShapleyMethod, ShapleyModel,
};
pub use stats::{
    Counter, Outcomes, PathStats, StatsDelta, StatsError, StatsNode, DEFAULT_MAX_CHANNELS, MAX_MARKOV_ORDER,
    OVERFLOW_CHANNEL,
};
