//! # apportion-wire
//!
//! The protobuf encoding of apportion's wire schema of record,
//! `proto/apportion/v1/apportion.proto`, next to the JSON contract of
//! docs/contract.md that mirrors it field by field.
//!
//! ## Why it looks like this
//! - **One validator for both encodings.** A protobuf [`pb::InputEvent`] is
//!   turned into the JSON object form of the same event and handed to the
//!   engine's own parser ([`apportion_contract::event::parse_event_limited`]).
//!   So an event is accepted, or rejected with a given
//!   [`RejectReason`](apportion_contract::RejectReason), by exactly the same
//!   rules whichever encoding it came in; there is no second copy of the
//!   rules to drift. The cost is one small JSON rendering per protobuf
//!   event.
//! - **No `protoc`.** `build.rs` compiles the `.proto` with protox (a
//!   pure-Rust schema compiler) and prost-build; the generated code lives in
//!   `OUT_DIR`, so the `.proto` file is the only source of truth.
//! - **The schema and the serde types stay in step.** The tests compare the
//!   compiled descriptor ([`FILE_DESCRIPTOR_SET`]) with the serde field names
//!   and order of [`CreditRow`](apportion_contract::CreditRow),
//!   [`PathRow`](apportion_contract::PathRow) and
//!   [`DeadLetter`](apportion_contract::DeadLetter), and pin every field
//!   number: field numbers never change.
//!
//! ## Layout
//! - [`pb`]: the generated messages (`apportion.v1`).
//! - `event`: [`decode_event_protobuf`], [`encode_event_protobuf`].
//! - `output`: encode / decode of credit rows, path rows and dead letters.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

mod event;
mod output;

/// Messages generated from `proto/apportion/v1/apportion.proto` (package
/// `apportion.v1`). Field documentation is the `.proto`'s.
#[allow(missing_docs, clippy::all)]
pub mod pb {
    include!(concat!(env!("OUT_DIR"), "/apportion.v1.rs"));
}

/// The compiled schema: an encoded `google.protobuf.FileDescriptorSet` of
/// `apportion/v1/apportion.proto` (with source info), e.g. for a schema
/// registry or for reflection-based consumers.
pub const FILE_DESCRIPTOR_SET: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/apportion_v1_descriptor.bin"));

/// Protobuf package of this schema version.
pub const PACKAGE: &str = "apportion.v1";

pub use event::{decode_event_protobuf, encode_event_protobuf, sniff_protobuf, to_contract_json};
pub use output::{
    decode_credit_protobuf, decode_dead_letter_protobuf, decode_path_protobuf, encode_credit_protobuf,
    encode_dead_letter_protobuf, encode_path_protobuf,
};
