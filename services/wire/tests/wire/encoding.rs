//! Wire bytes assembled by hand from the Protocol Buffers encoding
//! specification (protobuf.dev/programming-guides/encoding): a tag is the
//! varint `(field_number << 3) | wire_type` (0 = VARINT, 1 = I64, 2 = LEN);
//! varints are little-endian base-128 (the spec's example: 150 = `96 01`);
//! negative int32/int64 varints take ten bytes; double is 8 bytes
//! little-endian IEEE 754; proto3 fields without `optional` are not written
//! at their default value, `optional` ones are written whenever set;
//! parsers accept fields in any order and skip unknown ones.

use apportion_engine::contract::event::{parse_event, DEFAULT_MAX_EVENT_BYTES};
use apportion_engine::contract::{DeadLetter, ModelId, RejectReason, Timestamp, UserKey};
use apportion_engine::{CreditRow, PathRow};
use apportion_wire::{
    decode_credit_protobuf, decode_event_protobuf, encode_credit_protobuf, encode_dead_letter_protobuf,
    encode_path_protobuf,
};

/// touch "e" for user "u" on channel "x" at 150 ms, fields in number order:
/// 1:VARINT 1 | 2:LEN "e" | 3:LEN "u" | 5:VARINT 150 | 6:LEN "x".
const TOUCH: &[u8] = &[0x08, 0x01, 0x12, 0x01, b'e', 0x1a, 0x01, b'u', 0x28, 0x96, 0x01, 0x32, 0x01, b'x'];

#[test]
fn hand_assembled_input_event_decodes_as_its_json_twin() {
    let json = parse_event(br#"{"type":"touch","event_id":"e","user_id":"u","timestamp":150,"channel":"x"}"#).unwrap();
    assert_eq!(decode_event_protobuf(TOUCH, DEFAULT_MAX_EVENT_BYTES).unwrap(), json);

    // Same fields in reverse order.
    let reversed: &[u8] = &[0x32, 0x01, b'x', 0x28, 0x96, 0x01, 0x1a, 0x01, b'u', 0x12, 0x01, b'e', 0x08, 0x01];
    assert_eq!(decode_event_protobuf(reversed, DEFAULT_MAX_EVENT_BYTES).unwrap(), json);

    // An unknown field 99 (tag 99 << 3 = 792 = varint `98 06`) with value 1
    // is skipped, as the contract ignores unknown fields.
    let mut extra = TOUCH.to_vec();
    extra.extend([0x98, 0x06, 0x01]);
    assert_eq!(decode_event_protobuf(&extra, DEFAULT_MAX_EVENT_BYTES).unwrap(), json);

    // Field 4 (timestamp_rfc3339, LEN) instead of field 5.
    let mut rfc = vec![0x08, 0x01, 0x12, 0x01, b'e', 0x1a, 0x01, b'u', 0x22, 20];
    rfc.extend(b"1970-01-01T00:00:00Z");
    rfc.extend([0x32, 0x01, b'x']);
    let ev = decode_event_protobuf(&rfc, DEFAULT_MAX_EVENT_BYTES).unwrap();
    assert_eq!(ev.timestamp_ms, 0);
    assert_eq!(ev.channel, "x");
}

/// The bytes `with` has that `without` lacks, when `with` is `without`
/// with one contiguous run inserted (fields are written in field-number
/// order, so setting one field inserts its record at one place).
fn inserted(without: &[u8], with: &[u8]) -> Vec<u8> {
    let prefix = without.iter().zip(with).take_while(|(a, b)| a == b).count();
    let suffix = without[prefix..].iter().rev().zip(with[prefix..].iter().rev()).take_while(|(a, b)| a == b).count();
    assert_eq!(with.len() - (prefix + suffix), with.len() - without.len(), "not a single insertion");
    with[prefix..with.len() - suffix].to_vec()
}

#[test]
fn output_rows_follow_the_encoding_rules() {
    // A row with every optional field absent and every number at its
    // default; then one field set at a time: exactly its record appears.
    let base = CreditRow {
        credit_id: String::new(),
        conversion_id: String::new(),
        user_key: UserKey([0; 32]),
        model: ModelId::Linear,
        model_version: None,
        goal: String::new(),
        touch_event_id: None,
        channel: String::new(),
        campaign: None,
        interaction: None,
        position: 0,
        path_length: 0,
        touch_timestamp: None,
        conversion_timestamp: Timestamp(0),
        credit: 0.0,
        credited_value: None,
        currency: None,
    };
    let b = encode_credit_protobuf(&base);
    // Unset optional fields and zero numbers are not written: only the
    // three typed fields that are always present (user_key as 64 hex
    // digits: field 3, LEN, tag 0x1a, length 64; model: field 4, tag 0x22;
    // conversion_timestamp: field 14, tag 0x72, 24 bytes).
    let mut want = vec![0x1a, 64];
    want.extend("0".repeat(64).bytes());
    want.extend([0x22, 6]);
    want.extend(b"linear");
    want.extend([0x72, 24]);
    want.extend(b"1970-01-01T00:00:00.000Z");
    assert_eq!(b, want);
    // credit = 1.0: field 15, I64 -> tag 121 = 0x79; 1.0 = 0x3FF0000000000000.
    let one = CreditRow { credit: 1.0, ..base.clone() };
    assert_eq!(inserted(&b, &encode_credit_protobuf(&one)), [0x79, 0, 0, 0, 0, 0, 0, 0xf0, 0x3f]);
    // optional credited_value = 0.0 is written (explicit presence): field 16,
    // I64 -> tag 129 = varint `81 01`.
    let zero = CreditRow { credited_value: Some(0.0), ..base.clone() };
    let bytes = encode_credit_protobuf(&zero);
    assert_eq!(inserted(&b, &bytes), [0x81, 0x01, 0, 0, 0, 0, 0, 0, 0, 0]);
    assert_eq!(decode_credit_protobuf(&bytes).unwrap().credited_value, Some(0.0));
    // position = 150: field 11, VARINT -> tag 0x58, then `96 01`.
    let pos = CreditRow { position: 150, ..base };
    assert_eq!(inserted(&b, &encode_credit_protobuf(&pos)), [0x58, 0x96, 0x01]);

    // Repeated strings: one LEN record per element, field 6 -> tag 0x32.
    let path = PathRow {
        path_id: String::new(),
        user_key: UserKey([0; 32]),
        converted: false,
        conversion_id: None,
        goal: None,
        channels: vec![],
        touch_count: 0,
        first_touch_timestamp: Timestamp(0),
        last_touch_timestamp: Timestamp(0),
    };
    let with = PathRow { channels: vec!["a".into(), "b".into()], ..path.clone() };
    assert_eq!(
        inserted(&encode_path_protobuf(&path), &encode_path_protobuf(&with)),
        [0x32, 0x01, b'a', 0x32, 0x01, b'b']
    );

    let dl = DeadLetter {
        reason: RejectReason::Late,
        detail: String::new(),
        source: String::new(),
        partition: None,
        offset: None,
        event_id: None,
        received_at: Timestamp(0),
    };
    let b = encode_dead_letter_protobuf(&dl);
    // Negative int32: ten-byte varint. Field 4, VARINT -> tag 0x20.
    let neg = DeadLetter { partition: Some(-1), ..dl.clone() };
    assert_eq!(
        inserted(&b, &encode_dead_letter_protobuf(&neg)),
        [0x20, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01]
    );
    // optional offset = 0 is written: field 5, VARINT -> tag 0x28, value 0.
    let off = DeadLetter { offset: Some(0), ..dl };
    assert_eq!(inserted(&b, &encode_dead_letter_protobuf(&off)), [0x28, 0x00]);
}
