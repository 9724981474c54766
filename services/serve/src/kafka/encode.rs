//! Payload encodings of the output topics: JSON (default) or the protobuf
//! messages of proto/apportion/v1 (`output_format`).

use apportion_contract::{CreditRow, DeadLetter, PathRow};

use crate::config::Format;

/// Encodes a credit row.
pub fn credit(format: Format, r: &CreditRow) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(r).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_credit_protobuf(r),
    }
}

/// Encodes a path row.
pub fn path(format: Format, r: &PathRow) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(r).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_path_protobuf(r),
    }
}

/// Encodes a dead letter.
pub fn dead_letter(format: Format, d: &DeadLetter) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(d).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_dead_letter_protobuf(d),
    }
}
