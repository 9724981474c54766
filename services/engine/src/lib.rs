//! # apportion-engine
//!
//! The pure, deterministic core of apportion: journey rules, every
//! attribution model and the credit rows they produce. The contract's types
//! (events, reject reasons, rows, model names) live in `apportion-contract`.
//!
//! Why pure: the same code serves `replay`, `serve` and the tests. There is
//! no IO, no async, no clock and no unseeded randomness here; time arrives as
//! a watermark argument and persistence is the caller's business (state is
//! plain serde values). Most of the project's tests live in this crate.
//!
//! ## Layout
//! - [`pseudonym`]: HMAC-SHA256 user keys; raw ids go no further.
//! - [`journey`]: per-user journey state and the rules that close it.
//! - [`processor`]: applies events to journeys held in a [`processor::JourneyStore`].
//! - [`model`]: the [`model::Model`] trait and the five rule models.
//! - [`datadriven`]: path statistics, `shapley` and `markov`.
//! - [`credit`]: builds credit rows and path rows from journey outcomes.
//! - [`registry`]: builds the configured models ([`registry::ModelPlan`]).
//! - [`replay`]: the replay loop and driver (duplicates, two passes, end of input).
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod credit;
pub mod datadriven;
pub mod journey;
pub mod model;
pub mod processor;
pub mod pseudonym;
pub mod registry;
pub mod replay;

pub use apportion_contract as contract;
pub use apportion_contract::{CreditRow, Event, EventKind, Interaction, ModelId, PathRow, UserKey};
pub use credit::{credit_id, credit_rows, path_row};
pub use journey::{Conversion, Journey, Outcome, Rules, Touch};
pub use model::Model;
pub use processor::{Effect, JourneyEvent, JourneyEventKind, JourneyStore, MemStore, Processor};
pub use pseudonym::Pseudonymizer;
pub use registry::{ModelPlan, RuleParams};
