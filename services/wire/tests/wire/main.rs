//! Tests of apportion-wire, compiled as one binary.
//!
//! Where the expected values come from:
//! - the JSON contract as implemented by the engine's parser and replay
//!   (`apportion_engine::event::parse_event`, `replay::replay_lines`): the
//!   protobuf path must agree with it exactly;
//! - the Protocol Buffers encoding specification
//!   (protobuf.dev, "Encoding": tags, varints, fixed64, explicit presence)
//!   for hand-assembled wire bytes;
//! - the serde field names of the engine's / sinks' row types for the
//!   schema-in-step checks.
//!
//! Events are demo data of the project's own scenario (the example trail shop).

mod common;
mod encoding;
mod round_trip;
mod same_credit;
mod schema;
