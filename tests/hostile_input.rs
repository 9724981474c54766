//! Malformed and hostile input through `apportion replay`: every case puts
//! one bad line between good events of other users, and checks the bad
//! line's dead letter (its reason code and what its detail names) and that
//! the good conversions before and after it are credited. No server needed.
//!
//! Check values: the reason codes of docs/contract.md "Reject reasons",
//! derived by hand for each line; where a case rests on a standard, the
//! section is cited beside it (RFC 8259 for JSON, RFC 3629 for UTF-8,
//! RFC 3339 for times).

use std::path::Path;

use apportion_e2e::*;
use serde_json::Value;

/// What must become of the hostile line.
enum Want {
    /// Rejected with this reason code; the detail contains the text.
    Rejected(&'static str, &'static str),
    /// Accepted: a conversion of the hostile user, id `h-c`, credited with
    /// this conversion time.
    Credited(&'static str),
    /// Valid but without consent to measurement: neither rejected nor
    /// credited (contract: Input events, Consent).
    Dropped,
}

use Want::*;

struct Case {
    name: &'static str,
    line: Vec<u8>,
    want: Want,
}

/// A conversion of the hostile user with `fields` spliced in after the id
/// (each case overrides or adds what it needs; a repeated key is a case).
fn conv(fields: &str) -> Vec<u8> {
    format!(r#"{{"type":"conversion","event_id":"h-c","user_id":"hostile"{fields}}}"#).into_bytes()
}

/// A conversion at the usual time with `extra` fields appended.
fn conv_at(extra: &str) -> Vec<u8> {
    conv(&format!(r#","timestamp":"2026-03-01T10:30:00Z"{extra}"#))
}

/// A touch of the hostile user with `extra` fields appended.
fn touch(extra: &str) -> Vec<u8> {
    format!(r#"{{"type":"touch","event_id":"h-t","user_id":"hostile","timestamp":"2026-03-01T10:30:00Z"{extra}}}"#)
        .into_bytes()
}

fn bytes(parts: &[&[u8]]) -> Vec<u8> {
    parts.concat()
}

fn cases() -> Vec<Case> {
    let c = |name, line, want| Case { name, line, want };
    let deep = |n: usize| format!("{}{}", "[".repeat(n), "]".repeat(n));
    vec![
        // --- JSON syntax (RFC 8259) ---
        c("truncated object", conv_at("").split_last().unwrap().1.to_vec(), Rejected("invalid_json", "EOF")),
        c("trailing comma", conv_at(",").to_vec(), Rejected("invalid_json", "trailing comma")),
        c(
            "two objects on one line",
            bytes(&[&conv_at(""), b" {\"type\":\"touch\"}"]),
            Rejected("invalid_json", "trailing characters"),
        ),
        // RFC 8259 section 6: NaN and Infinity are not permitted.
        c("NaN literal", conv_at(r#","value":NaN"#), Rejected("invalid_json", "expected value")),
        c("Infinity literal", conv_at(r#","value":Infinity"#), Rejected("invalid_json", "expected value")),
        c("NaN as text", conv_at(r#","value":"NaN""#), Rejected("invalid_value", "must be a number, got a string")),
        // 1e400 overflows an IEEE 754 double (max about 1.8e308).
        c("huge number", conv_at(r#","value":1e400"#), Rejected("invalid_json", "number out of range")),
        c("negative value", conv_at(r#","value":-1"#), Rejected("invalid_value", "finite number >= 0")),
        // RFC 8259 section 4: names SHOULD be unique; the contract rejects a
        // repeated field it reads.
        c(
            "duplicate contract key",
            touch(r#","channel":"email","channel":"search""#),
            Rejected("invalid_json", "duplicate field `channel`"),
        ),
        c("duplicate type key", conv_at(r#","type":"touch""#), Rejected("invalid_json", "duplicate field `type`")),
        // ... and skips a key it does not name, repeated or not.
        c("duplicate unknown key", conv_at(r#","note":1,"note":2"#), Credited("2026-03-01T10:30:00.000Z")),
        // Nesting: a contract field holding an array is a type error; deep
        // nesting under an unknown key is skipped without recursion.
        c(
            "deep nesting in a contract field",
            touch(&format!(r#","channel":{}"#, deep(200))),
            Rejected("invalid_channel", "must be a string, got an array or object"),
        ),
        c("deep nesting under an unknown key", conv_at(&format!(r#","extra":{}"#, deep(100_000))), Credited("2026-03-01T10:30:00.000Z")),
        c("top-level array", b"[1,2,3]".to_vec(), Rejected("not_an_object", "must be a JSON object")),
        c("top-level string", br#""touch""#.to_vec(), Rejected("not_an_object", "must be a JSON object")),
        // RFC 8259 section 8.1: no byte order mark.
        c("byte order mark", bytes(&[b"\xef\xbb\xbf", &conv_at("")]), Rejected("invalid_json", "byte order mark")),
        // RFC 8259 section 7: control characters must be escaped in strings.
        c("raw NUL in a string", touch(",\"channel\":\"e\0mail\""), Rejected("invalid_json", "control character")),
        c("NUL after the object", bytes(&[&conv_at(""), b"\0"]), Rejected("invalid_json", "trailing characters")),
        // `\u0000` is valid JSON, but PostgreSQL text cannot hold U+0000.
        c("escaped NUL in channel", touch(r#","channel":"e\u0000mail""#), Rejected("invalid_channel", "U+0000")),
        c(
            "escaped NUL in user_id",
            br#"{"type":"conversion","event_id":"h-c","user_id":"a\u0000b","timestamp":"2026-03-01T10:30:00Z"}"#
                .to_vec(),
            Rejected("invalid_user_id", "U+0000"),
        ),
        // RFC 8259 section 8.2: a lone surrogate escape is not a character.
        c("lone surrogate escape", conv_at(r#","goal":"\ud800x""#), Rejected("invalid_json", "escape")),
        // RFC 8259 section 2: CR and tab are insignificant whitespace.
        c(
            "CR and tab between tokens",
            b"{\"type\":\"conversion\",\r\"event_id\":\"h-c\",\t\"user_id\":\"hostile\",\"timestamp\":\"2026-03-01T10:30:00Z\"}"
                .to_vec(),
            Credited("2026-03-01T10:30:00.000Z"),
        ),
        // --- UTF-8 (RFC 3629) ---
        c("invalid UTF-8 in a key", conv_at(",\"\u{0}\":1").iter().map(|&b| if b == 0 { 0xff } else { b }).collect(), Rejected("invalid_utf8", "not UTF-8")),
        // Section 3: the overlong form C0 AF of "/" is invalid.
        c("overlong UTF-8", touch(",\"channel\":\"a\u{1}b\"").iter().flat_map(|&b| if b == 1 { vec![0xc0, 0xaf] } else { vec![b] }).collect(), Rejected("invalid_utf8", "not UTF-8")),
        // Section 3: surrogates U+D800..U+DFFF must not be encoded (ED A0 80).
        c("UTF-8 encoded surrogate", touch(",\"channel\":\"a\u{1}b\"").iter().flat_map(|&b| if b == 1 { vec![0xed, 0xa0, 0x80] } else { vec![b] }).collect(), Rejected("invalid_utf8", "not UTF-8")),
        // --- size ---
        c("line above max_event_bytes", conv_at(&format!(r#","pad":"{}""#, "x".repeat(1 << 20))), Rejected("too_large", "at most 1048576")),
        // --- ids ---
        c(
            "overlong event_id",
            format!(r#"{{"type":"conversion","event_id":"{}","user_id":"hostile","timestamp":0}}"#, "e".repeat(129)).into_bytes(),
            Rejected("invalid_event_id", "129 bytes, at most 128"),
        ),
        c(
            "overlong user_id",
            format!(r#"{{"type":"conversion","event_id":"h-c","user_id":"{}","timestamp":0}}"#, "u".repeat(257)).into_bytes(),
            Rejected("invalid_user_id", "257 bytes, at most 256"),
        ),
        c("overlong channel", touch(&format!(r#","channel":"{}""#, "c".repeat(257))), Rejected("invalid_channel", "257 bytes, at most 256")),
        c(
            "numeric event_id",
            br#"{"type":"conversion","event_id":42,"user_id":"hostile","timestamp":0}"#.to_vec(),
            Rejected("invalid_event_id", "must be a string, got a number"),
        ),
        c(
            "object user_id",
            br#"{"type":"conversion","event_id":"h-c","user_id":{"id":1},"timestamp":0}"#.to_vec(),
            Rejected("invalid_user_id", "got an array or object"),
        ),
        c(
            "boolean user_id",
            br#"{"type":"conversion","event_id":"h-c","user_id":true,"timestamp":0}"#.to_vec(),
            Rejected("invalid_user_id", "got a boolean"),
        ),
        c(
            "empty event_id",
            br#"{"type":"conversion","event_id":"","user_id":"hostile","timestamp":0}"#.to_vec(),
            Rejected("invalid_event_id", "must not be empty"),
        ),
        // --- type and labels ---
        c(
            "type in capitals",
            br#"{"type":"Touch","event_id":"h-t","user_id":"hostile","timestamp":0,"channel":"x"}"#.to_vec(),
            Rejected("invalid_type", "\"Touch\""),
        ),
        c("type missing", br#"{"event_id":"h-c","user_id":"hostile","timestamp":0}"#.to_vec(), Rejected("missing_type", "`type` is required")),
        c("timestamp null", conv(r#","timestamp":null"#), Rejected("missing_timestamp", "`timestamp` is required")),
        c("interaction in capitals", touch(r#","channel":"x","interaction":"VIEW""#), Rejected("invalid_interaction", "\"VIEW\"")),
        c("empty campaign", touch(r#","channel":"x","campaign":"""#), Rejected("invalid_campaign", "must not be empty")),
        c("numeric goal", conv_at(r#","goal":5"#), Rejected("invalid_goal", "must be a string, got a number")),
        c("lower-case currency", conv_at(r#","value":1,"currency":"eur""#), Rejected("invalid_currency", "\"eur\"")),
        // --- time (RFC 3339) ---
        // Year 9999 is in range but far beyond the time of the run plus
        // max_future_skew.
        c("year 9999", conv(r#","timestamp":"9999-12-31T23:59:59Z""#), Rejected("future_timestamp", "max_future_skew")),
        // RFC 3339 section 5.6: date-fullyear is 4 digits.
        c("year 10000", conv(r#","timestamp":"10000-01-01T00:00:00Z""#), Rejected("invalid_timestamp", "not an RFC 3339")),
        // 253402300800000 ms = 10000-01-01T00:00:00Z (derived by hand:
        // 2932897 days after 1970-01-01, times 86400000).
        c("epoch ms past year 9999", conv(r#","timestamp":253402300800000"#), Rejected("invalid_timestamp", "out of range")),
        // 2^64 (derived by hand) does not fit u64.
        c("epoch ms beyond u64", conv(r#","timestamp":18446744073709551616"#), Rejected("invalid_timestamp", "out of range")),
        c("epoch ms before year 1", conv(r#","timestamp":-62135596800001"#), Rejected("invalid_timestamp", "out of range")),
        c("epoch ms with exponent", conv(r#","timestamp":1.7723598e12"#), Rejected("invalid_timestamp", "fraction or exponent")),
        // Negative epoch milliseconds are instants before 1970: accepted.
        c("negative epoch", conv(r#","timestamp":-1"#), Credited("1969-12-31T23:59:59.999Z")),
        // RFC 3339 section 5.7 example of a leap second; read as the last
        // millisecond before it (epoch time has no leap seconds).
        c("leap second", conv(r#","timestamp":"2016-12-31T23:59:60Z""#), Credited("2016-12-31T23:59:59.999Z")),
        c("leap second with offset", conv(r#","timestamp":"2016-12-31T15:59:60-08:00""#), Credited("2016-12-31T23:59:59.999Z")),
        // RFC 3339 section 5.7: a leap second only at the end of a month.
        c("leap second mid-day", conv(r#","timestamp":"2026-03-01T10:00:60Z""#), Rejected("invalid_timestamp", "2026-03-01T10:00:60Z")),
        // 2026 is not a leap year (Gregorian rule).
        c("February 29 of 2026", conv(r#","timestamp":"2026-02-29T10:00:00Z""#), Rejected("invalid_timestamp", "not an RFC 3339")),
        // RFC 3339 section 5.6: time-numoffset hours are 00..23.
        c("offset +24:00", conv(r#","timestamp":"2026-03-01T10:00:00+24:00""#), Rejected("invalid_timestamp", "not an RFC 3339")),
        c("no offset", conv(r#","timestamp":"2026-03-01T10:00:00""#), Rejected("invalid_timestamp", "not an RFC 3339")),
        // RFC 3339 section 5.6 NOTE: "T" and "Z" may be lower case.
        c("lower-case t and z", conv(r#","timestamp":"2026-03-01t10:30:00z""#), Credited("2026-03-01T10:30:00.000Z")),
        // IEEE 754 negative zero is >= 0; stored as 0 (checked below).
        c("value -0.0", conv_at(r#","value":-0.0"#), Credited("2026-03-01T10:30:00.000Z")),
        // --- consent (contract: Input events, Consent) ---
        c("consent not an object", conv_at(r#","consent":"no""#), Rejected("invalid_consent", "must be an object")),
        c(
            "consent.measurement as text",
            conv_at(r#","consent":{"measurement":"false"}"#),
            Rejected("invalid_consent", "true or false, got a string"),
        ),
        c(
            "repeated consent.measurement",
            conv_at(r#","consent":{"measurement":true,"measurement":false}"#),
            Rejected("invalid_json", "duplicate field `measurement`"),
        ),
        c("no consent to measurement", conv_at(r#","consent":{"measurement":false}"#), Dropped),
        c(
            "consent given, unknown consent keys",
            conv_at(r#","consent":{"measurement":true,"ads":{"x":[1]}}"#),
            Credited("2026-03-01T10:30:00.000Z"),
        ),
    ]
}

const BEFORE: &[&str] = &[
    r#"{"type":"touch","event_id":"b-t","user_id":"before","timestamp":"2026-03-01T09:00:00Z","channel":"email"}"#,
    r#"{"type":"conversion","event_id":"b-c","user_id":"before","timestamp":"2026-03-01T10:00:00Z","value":10}"#,
];
const AFTER: &[&str] = &[
    r#"{"type":"touch","event_id":"a-t","user_id":"after","timestamp":"2026-03-01T11:00:00Z","channel":"search"}"#,
    r#"{"type":"conversion","event_id":"a-c","user_id":"after","timestamp":"2026-03-01T12:00:00Z","value":20}"#,
];
const MODELS: [&str; 2] = ["last_touch", "linear"];

/// Runs replay on `input`; returns (credit rows, rejected lines).
fn run(dir: &Path, input: &[u8], models: &str) -> (Vec<Value>, Vec<Value>) {
    let (inp, out, rej) = (dir.join("in.ndjson"), dir.join("credit.ndjson"), dir.join("rejected.ndjson"));
    std::fs::write(&inp, input).unwrap();
    let o = apportion()
        .args(["replay", "--quiet", "--models", models, "--input"])
        .arg(&inp)
        .arg("--output")
        .arg(&out)
        .arg("--rejected")
        .arg(&rej)
        .env("APPORTION_PSEUDONYM_KEY", KEY)
        .output()
        .unwrap();
    assert!(o.status.success(), "replay failed: {}", String::from_utf8_lossy(&o.stderr));
    let read = |p: &Path| -> Vec<Value> {
        std::fs::read_to_string(p).unwrap_or_default().lines().map(|l| serde_json::from_str(l).unwrap()).collect()
    };
    (read(&out), read(&rej))
}

/// Rows of one conversion under one model; their credits sum to 1 within
/// 1e-9 and none is negative (docs/contract.md, "Models").
fn rows_of<'a>(rows: &'a [Value], conversion: &str, model: &str) -> Vec<&'a Value> {
    let r: Vec<&Value> = rows.iter().filter(|r| r["conversion_id"] == conversion && r["model"] == model).collect();
    assert!(!r.is_empty(), "{conversion} not credited by {model}");
    let sum: f64 = r.iter().map(|r| r["credit"].as_f64().unwrap()).sum();
    assert!((sum - 1.0).abs() <= 1e-9, "{conversion} {model}: credits sum to {sum}");
    assert!(r.iter().all(|r| r["credit"].as_f64().unwrap() >= 0.0), "{conversion} {model}: negative credit");
    r
}

fn check_good(rows: &[Value], name: &str) {
    for (conv, touch, value) in [("b-c", "b-t", 10.0), ("a-c", "a-t", 20.0)] {
        for m in MODELS {
            let r = rows_of(rows, conv, m);
            assert_eq!(r.len(), 1, "{name}: {conv} {m} should have its one touch");
            assert_eq!(r[0]["touch_event_id"], touch, "{name}");
            assert_eq!(r[0]["credited_value"].as_f64(), Some(value), "{name}");
        }
    }
}

#[test]
fn hostile_lines_get_their_reason_and_cost_no_good_data() {
    let cases = cases();
    let rejected = cases.iter().filter(|c| matches!(c.want, Rejected(..))).count();
    assert!(rejected >= 30, "at least 30 kinds of rejected input, have {rejected}");
    let dir = tempfile::tempdir().unwrap();
    let mut failures = Vec::new();
    for case in &cases {
        let mut input = Vec::new();
        for l in BEFORE {
            input.extend_from_slice(l.as_bytes());
            input.push(b'\n');
        }
        input.extend_from_slice(&case.line);
        input.push(b'\n');
        for l in AFTER {
            input.extend_from_slice(l.as_bytes());
            input.push(b'\n');
        }
        let (rows, rej) = run(dir.path(), &input, &MODELS.join(","));
        let outcome = std::panic::catch_unwind(|| {
            check_good(&rows, case.name);
            match case.want {
                Rejected(reason, detail) => {
                    assert_eq!(rej.len(), 1, "one dead letter: {rej:?}");
                    assert_eq!(rej[0]["line"], 3, "the bad line's number");
                    assert_eq!(rej[0]["reason"], reason, "reason; detail {}", rej[0]["detail"]);
                    let d = rej[0]["detail"].as_str().unwrap();
                    assert!(d.contains(detail), "detail {d:?} should name {detail:?}");
                    assert!(!rows.iter().any(|r| r["conversion_id"] == "h-c"), "a rejected line was credited");
                }
                Dropped => {
                    assert!(rej.is_empty(), "nothing rejected: {rej:?}");
                    assert!(!rows.iter().any(|r| r["conversion_id"] == "h-c"), "an event without consent was credited");
                }
                Credited(at) => {
                    assert!(rej.is_empty(), "nothing rejected: {rej:?}");
                    for m in MODELS {
                        let r = rows_of(&rows, "h-c", m);
                        assert_eq!(r[0]["conversion_timestamp"], at);
                        // A credited value is never a negative zero.
                        if let Some(v) = r[0]["credited_value"].as_f64() {
                            assert!(v.is_sign_positive(), "credited_value {v}");
                        }
                    }
                }
            }
        });
        if let Err(e) = outcome {
            let msg = e.downcast_ref::<String>().cloned().unwrap_or_default();
            failures.push(format!("{}: {msg}", case.name));
        }
    }
    assert!(failures.is_empty(), "{} case(s) failed:\n{}", failures.len(), failures.join("\n"));
}

#[test]
fn crlf_line_endings_lose_nothing() {
    // RFC 8259 section 2 counts CR as whitespace; a file written with CRLF
    // line ends reads as the same events.
    let dir = tempfile::tempdir().unwrap();
    let input: Vec<u8> = BEFORE.iter().chain(AFTER).flat_map(|l| [l.as_bytes(), b"\r\n"].concat()).collect();
    let (rows, rej) = run(dir.path(), &input, &MODELS.join(","));
    assert!(rej.is_empty(), "{rej:?}");
    check_good(&rows, "crlf");
}

#[test]
fn a_user_with_ten_thousand_touches_is_capped_credited_and_costs_no_good_data() {
    // 10 000 touches a second apart, then a conversion: one run of 10 000
    // touches, which max_touches_per_journey (default 1000,
    // default_config.toml; docs/contract.md "Touch cap") cuts to the newest
    // 1000. Every model credits those 1000, its credits sum to 1, and the
    // neighbours' conversions are credited.
    let dir = tempfile::tempdir().unwrap();
    let mut input = String::new();
    for l in BEFORE {
        input.push_str(l);
        input.push('\n');
    }
    let channels = ["email", "search", "social", "display"];
    for i in 0..10_000u32 {
        input.push_str(&format!(
            r#"{{"type":"touch","event_id":"h-t{i}","user_id":"hostile","timestamp":{},"channel":"{}"}}"#,
            1_772_352_000_000i64 + i64::from(i) * 1000, // from 2026-03-01T08:00:00Z (derived by hand)
            channels[i as usize % 4]
        ));
        input.push('\n');
    }
    input.push_str(r#"{"type":"conversion","event_id":"h-c","user_id":"hostile","timestamp":"2026-03-01T11:00:00Z"}"#);
    input.push('\n');
    for l in AFTER {
        input.push_str(l);
        input.push('\n');
    }
    let models = "last_touch,first_touch,linear,time_decay,u_shaped,shapley,markov";
    let (rows, rej) = run(dir.path(), input.as_bytes(), models);
    assert!(rej.is_empty(), "{rej:?}");
    let newest: Vec<String> = (9_000..10_000).map(|i| format!("h-t{i}")).collect();
    for m in models.split(',') {
        let r = rows_of(&rows, "h-c", m);
        assert_eq!(r.len(), 1000, "{m}: one row per kept touch");
        assert!(r.iter().all(|r| r["path_length"] == 1000));
        let mut ids: Vec<String> = r.iter().map(|r| r["touch_event_id"].as_str().unwrap().to_string()).collect();
        ids.sort_by_key(|id| id[3..].parse::<u32>().unwrap());
        assert_eq!(ids, newest, "{m}: the newest 1000 touches are kept");
        for conv in ["b-c", "a-c"] {
            rows_of(&rows, conv, m);
        }
    }
}
