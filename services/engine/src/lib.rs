//! # apportion-engine
//!
//! The pure, deterministic core of apportion: the input contract, journey
//! rules, every attribution model and the credit rows they produce.
//!
//! Why pure: the same code serves `replay`, `serve` and the tests. There is
//! no IO, no async, no clock and no unseeded randomness here; time arrives as
//! a watermark argument and persistence is the caller's business (state is
//! plain serde values). Most of the project's tests live in this crate.
//!
//! ## Layout
//! - [`event`]: parse and validate one input event, with typed reject reasons.
//! - [`pseudonym`]: HMAC-SHA256 user keys; raw ids go no further.
//! - [`journey`]: per-user journey state and the rules that close it.
//! - [`processor`]: applies events to journeys held in a [`processor::JourneyStore`].
//! - [`model`]: the [`model::Model`] trait and the five rule models.
//! - [`datadriven`]: path statistics, `shapley` and `markov`.
//! - [`credit`]: credit rows and path rows of the output contract.
//! - [`registry`]: builds the configured models by name.
//! - [`replay`]: the replay loop (duplicates, watermark, end of input).
//! - [`time_fmt`], [`duration`]: RFC 3339 times and `30d`-style spans.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod credit;
pub mod datadriven;
pub mod duration;
pub mod event;
pub mod journey;
pub mod model;
pub mod processor;
pub mod pseudonym;
pub mod registry;
pub mod replay;
pub mod time_fmt;

pub use credit::{credit_id, credit_rows, path_row, CreditRow, PathRow, UNATTRIBUTED};
pub use duration::Span;
pub use event::{parse_event, parse_event_limited, Event, EventKind, Interaction, RejectReason, Rejection};
pub use journey::{Conversion, Journey, Outcome, Rules, Touch};
pub use model::Model;
pub use pseudonym::{Pseudonymizer, UserKey};
pub use processor::{Effect, JourneyStore, KeyedEvent, KeyedKind, MemStore, Processor};
