//! # apportion-contract
//!
//! The contract of apportion in code: what an input event is and why one is
//! rejected, the model names, the output rows and the way times and user
//! keys are written. Its prose form is docs/contract.md; every type here
//! cites the section it implements.
//!
//! Why a crate of its own: the engine, the sinks and the wire encoding all
//! speak the contract, and none of them should pull in the others to do so
//! (the protobuf encoding must not drag in Parquet and PostgreSQL because
//! the dead-letter row used to live with the sinks). Dependencies point one
//! way: everything depends on this crate, it depends on nothing of ours.
//!
//! Why typed values: a row keeps its user key binary, its times as epoch
//! milliseconds and its model and interaction as enums until the output
//! edge, so the Parquet and PostgreSQL sinks never parse text back and a
//! misspelt model name cannot exist inside the service.
//!
//! ## Layout
//! - [`event`]: parse and validate one input event ([`parse_event`]).
//! - [`reject`]: [`RejectReason`] codes and [`Rejection`].
//! - [`key`]: [`UserKey`], the pseudonymous key.
//! - [`model_id`]: [`ModelId`], the model names.
//! - [`rows`]: [`CreditRow`], [`PathRow`], [`DeadLetter`].
//! - [`time`]: RFC 3339 parsing and formatting, [`Timestamp`].
//! - [`period`]: [`Period`], configured durations such as `30d`.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod event;
pub mod key;
pub mod model_id;
pub mod period;
pub mod reject;
pub mod rows;
pub mod time;

pub use event::{parse_event, parse_event_limited, Event, EventKind, Interaction};
pub use key::UserKey;
pub use model_id::{ModelId, ModelListError};
pub use period::{Period, PeriodError};
pub use reject::{RejectReason, Rejection};
pub use rows::{CreditRow, DeadLetter, ErasureRecord, PathRow, UNATTRIBUTED};
pub use time::{format_ms, parse_rfc3339_ms, Timestamp};
