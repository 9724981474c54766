//! Wire bytes assembled by hand from the Protocol Buffers encoding
//! specification (protobuf.dev/programming-guides/encoding): a tag is the
//! varint `(field_number << 3) | wire_type` (0 = VARINT, 1 = I64, 2 = LEN);
//! varints are little-endian base-128 (the spec's example: 150 = `96 01`);
//! negative int32/int64 varints take ten bytes; double is 8 bytes
//! little-endian IEEE 754; proto3 fields without `optional` are not written
//! at their default value, `optional` ones are written whenever set;
//! parsers accept fields in any order and skip unknown ones.

use apportion_engine::event::{parse_event, DEFAULT_MAX_EVENT_BYTES};
use apportion_engine::{CreditRow, PathRow};
use apportion_sinks::DeadLetter;
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

#[test]
fn output_rows_follow_the_encoding_rules() {
    let blank = CreditRow {
        credit_id: String::new(),
        conversion_id: String::new(),
        user_key: String::new(),
        model: String::new(),
        model_version: None,
        goal: String::new(),
        touch_event_id: None,
        channel: String::new(),
        campaign: None,
        interaction: None,
        position: 0,
        path_length: 0,
        touch_timestamp: None,
        conversion_timestamp: String::new(),
        credit: 0.0,
        credited_value: None,
        currency: None,
    };
    // Everything at its default: nothing is written.
    assert_eq!(encode_credit_protobuf(&blank), Vec::<u8>::new());
    // credit = 1.0: field 15, I64 -> tag 121 = 0x79; 1.0 = 0x3FF0000000000000.
    let one = CreditRow { credit: 1.0, ..blank.clone() };
    assert_eq!(encode_credit_protobuf(&one), [0x79, 0, 0, 0, 0, 0, 0, 0xf0, 0x3f]);
    // optional credited_value = 0.0 is written (explicit presence): field 16,
    // I64 -> tag 129 = varint `81 01`.
    let zero = CreditRow { credited_value: Some(0.0), ..blank.clone() };
    let bytes = encode_credit_protobuf(&zero);
    assert_eq!(bytes, [0x81, 0x01, 0, 0, 0, 0, 0, 0, 0, 0]);
    assert_eq!(decode_credit_protobuf(&bytes).unwrap().credited_value, Some(0.0));
    // position = 150: field 11, VARINT -> tag 0x58, then `96 01`.
    let pos = CreditRow { position: 150, ..blank };
    assert_eq!(encode_credit_protobuf(&pos), [0x58, 0x96, 0x01]);

    // Repeated strings: one LEN record per element, field 6 -> tag 0x32.
    let path = PathRow {
        path_id: String::new(),
        user_key: String::new(),
        converted: false,
        conversion_id: None,
        goal: None,
        channels: vec!["a".into(), "b".into()],
        touch_count: 0,
        first_touch_timestamp: String::new(),
        last_touch_timestamp: String::new(),
    };
    assert_eq!(encode_path_protobuf(&path), [0x32, 0x01, b'a', 0x32, 0x01, b'b']);

    let dl = DeadLetter {
        reason: String::new(),
        detail: String::new(),
        source: String::new(),
        partition: Some(-1),
        offset: None,
        event_id: None,
        received_at: String::new(),
    };
    // Negative int32: ten-byte varint. Field 4, VARINT -> tag 0x20.
    assert_eq!(encode_dead_letter_protobuf(&dl), [0x20, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01]);
    // optional offset = 0 is written: field 5, VARINT -> tag 0x28, value 0.
    let dl = DeadLetter { partition: None, offset: Some(0), ..dl };
    assert_eq!(encode_dead_letter_protobuf(&dl), [0x28, 0x00]);
}
