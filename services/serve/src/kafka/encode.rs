//! Payload encodings of the output topics: JSON (default) or the protobuf
//! messages of proto/apportion/v1 (`output_format`).

use apportion_contract::{CreditRow, DeadLetter, PathRow};

use crate::config::Format;

/// Encodes a credit row into `out` (cleared first; a buffer reused for a
/// whole batch saves an allocation per row).
pub fn credit_into(format: Format, r: &CreditRow, out: &mut Vec<u8>) {
    out.clear();
    match format {
        Format::Json => serde_json::to_writer(&mut *out, r).expect("rows serialize"),
        Format::Protobuf => out.extend_from_slice(&apportion_wire::encode_credit_protobuf(r)),
    }
}

/// Encodes a path row into `out` (cleared first).
pub fn path_into(format: Format, r: &PathRow, out: &mut Vec<u8>) {
    out.clear();
    match format {
        Format::Json => serde_json::to_writer(&mut *out, r).expect("rows serialize"),
        Format::Protobuf => out.extend_from_slice(&apportion_wire::encode_path_protobuf(r)),
    }
}

/// Encodes a dead letter.
pub fn dead_letter(format: Format, d: &DeadLetter) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(d).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_dead_letter_protobuf(d),
    }
}
