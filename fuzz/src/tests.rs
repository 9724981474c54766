//! The checks without AFL++: over the seed corpus, over seeded random bytes
//! (a coverage-less driver), and on inputs that must make them fail.

use super::*;

fn seeds(target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("seeds").join(target);
    let mut out: Vec<_> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| {
            let p = e.unwrap().path();
            (p.file_name().unwrap().to_string_lossy().into_owned(), std::fs::read(&p).unwrap())
        })
        .collect();
    out.sort();
    assert!(!out.is_empty(), "no seeds for {target}");
    out
}

/// xorshift64* (Vigna 2016, "An experimental exploration of Marsaglia's
/// xorshift generators, scrambled"): seeded bytes, no dependency.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    fn bytes(&mut self, n: usize) -> Vec<u8> {
        (0..n).map(|_| self.next() as u8).collect()
    }
}

/// Random edits of a seed: flip, insert, delete, splice a JSON token.
fn mutate(rng: &mut Rng, seed: &[u8]) -> Vec<u8> {
    const TOKENS: [&[u8]; 10] =
        [b"\"", b"{", b"}", b"[", b"\\u0000", b"null", b"-0.0", b"1e400", b"\xff", b"\"timestamp\":1e12,"];
    let mut v = seed.to_vec();
    for _ in 0..(rng.next() % 4 + 1) {
        let at = if v.is_empty() { 0 } else { (rng.next() as usize) % v.len() };
        match rng.next() % 4 {
            0 if !v.is_empty() => v[at] ^= 1 << (rng.next() % 8),
            1 => v.insert(at, rng.next() as u8),
            2 if !v.is_empty() => {
                v.remove(at);
            }
            _ => {
                let t = TOKENS[(rng.next() % TOKENS.len() as u64) as usize];
                v.splice(at..at, t.iter().copied());
            }
        }
    }
    v
}

#[test]
fn json_seeds_are_accepted_and_pass() {
    for (name, bytes) in seeds("event_json") {
        assert!(parse_event(&bytes).is_ok(), "seed {name} should be a valid event");
        check_event_json(&bytes);
    }
}

#[test]
fn protobuf_seeds_are_the_json_seeds_encoded() {
    // The protobuf seeds are the JSON seeds through the wire crate's
    // encoder; regenerate them with FUZZ_WRITE_SEEDS=1.
    let json = seeds("event_json");
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("seeds/event_protobuf");
    for (name, bytes) in &json {
        let pb = apportion_wire::encode_event_protobuf(std::str::from_utf8(bytes).unwrap()).unwrap();
        let path = dir.join(name.replace(".json", ".bin"));
        if std::env::var_os("FUZZ_WRITE_SEEDS").is_some() {
            std::fs::write(&path, &pb).unwrap();
        }
        assert_eq!(std::fs::read(&path).unwrap(), pb, "{} is stale", path.display());
        check_event_protobuf(&pb);
        assert_eq!(apportion_wire::decode_event_protobuf(&pb, usize::MAX), parse_event(bytes));
    }
}

#[test]
fn mutated_json_seeds_pass() {
    let mut rng = Rng(0x5eed_0001);
    let seeds = seeds("event_json");
    for i in 0..20_000 {
        let (_, s) = &seeds[i % seeds.len()];
        check_event_json(&mutate(&mut rng, s));
    }
}

#[test]
fn random_and_mutated_protobuf_pass() {
    let mut rng = Rng(0x5eed_0002);
    let seeds = seeds("event_protobuf");
    for i in 0..20_000 {
        let (_, s) = &seeds[i % seeds.len()];
        check_event_protobuf(&mutate(&mut rng, s));
        let n = (rng.next() % 64) as usize;
        check_event_protobuf(&rng.bytes(n));
    }
}

#[test]
fn engine_seeds_and_random_bytes_pass() {
    for (_, bytes) in seeds("engine") {
        check_engine_bytes(&bytes);
    }
    let mut rng = Rng(0x5eed_0003);
    for _ in 0..300 {
        let n = (rng.next() % 2048) as usize;
        check_engine_bytes(&rng.bytes(n));
    }
}

#[test]
fn engine_edge_scenarios_pass() {
    use When::*;
    // A conversion before any touch, touches at both ends of the accepted
    // range, a long burst, an erase between, and zero-length windows.
    let ops = vec![
        Op::Conversion { user: 0, at: Minutes(0), value: Some(100) },
        Op::Touch { user: 0, at: Earliest, channel: 0, view: false },
        Op::Touch { user: 0, at: Latest, channel: 1, view: true },
        Op::Burst { user: 1, at: Minutes(-300), count: 63 },
        Op::Conversion { user: 1, at: Minutes(0), value: None },
        Op::Watermark(Minutes(10)),
        Op::Erase { user: 0, at: Minutes(5) },
        Op::Conversion { user: 0, at: Latest, value: Some(0) },
        Op::Watermark(Latest),
    ];
    for (lookback_h, expiry_h) in [(0, 0), (255, 0), (0, 255), (24, 24)] {
        let s = Scenario {
            lookback_h,
            view_lookback_h: 1,
            expiry_h,
            half_life_min: 0,
            u_first: 255,
            u_last: 255,
            markov_order: 3,
            max_touches: if expiry_h == 0 { 0 } else { 5 },
            ops: ops.clone(),
        };
        check_engine(&s);
    }
}

#[test]
#[should_panic(expected = "channel")]
fn the_accepted_event_check_catches_a_nul() {
    // The check itself must be able to fail: an event as the parser must
    // never return it.
    let touch = seeds("event_json").into_iter().find(|(n, _)| n == "touch.json").unwrap().1;
    let mut ev = parse_event(&touch).unwrap();
    assert_eq!(ev.kind, EventKind::Touch);
    ev.channel = "a\0b".into();
    check_accepted(&ev);
}

#[test]
#[should_panic(expected = "sum to")]
fn the_credit_check_catches_a_model_that_does_not_sum_to_one() {
    struct Half;
    impl apportion_engine::Model for Half {
        fn id(&self) -> ModelId {
            ModelId::Linear
        }
        fn credit(&self, path: &[Touch], _t: i64) -> Vec<f64> {
            vec![0.5 / path.len() as f64; path.len()]
        }
    }
    let t = match touch(UserKey([1; 32]), 1, BASE_MS, "email", false).kind {
        JourneyEventKind::Touch(t) => t,
        _ => unreachable!(),
    };
    let c =
        Conversion { event_id: "c".into(), ts: BASE_MS, seq: 2, goal: "purchase".into(), value: None, currency: None };
    check_credit_rows(ModelId::Linear, &credit_rows(&UserKey([1; 32]), &c, &[t], &Half), 1);
}

#[test]
fn engine_inputs_make_long_scenarios() {
    // Every few bytes make a step (a length-prefixed list would give one or
    // two steps for most inputs, and the fuzzer little to work with).
    let mut rng = Rng(0x5eed_0004);
    for _ in 0..20 {
        let s = scenario(&rng.bytes(1000)).expect("1000 bytes make a scenario");
        assert_eq!(s.ops.len(), 64, "1000 bytes give the most steps");
    }
    assert_eq!(scenario(&[]).map(|s| s.ops.len()), Some(0), "no bytes, no steps");
}

#[test]
fn regressions_pass() {
    // Inputs that once failed a check (a crash of a fuzz run, minimized or
    // not), kept so that the fix stays: fuzz/regressions/<target>/.
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("regressions");
    let mut n = 0;
    for (target, check) in [
        ("event_json", check_event_json as fn(&[u8])),
        ("event_protobuf", check_event_protobuf),
        ("engine", check_engine_bytes),
    ] {
        let Ok(dir) = std::fs::read_dir(root.join(target)) else { continue };
        for e in dir {
            let p = e.unwrap().path();
            check(&std::fs::read(&p).unwrap());
            n += 1;
        }
    }
    assert!(n >= 2, "the regression inputs are missing");
}

#[test]
fn an_accepted_conversion_ignores_an_unknown_interaction() {
    // Found by the event_protobuf target: `interaction` is read on touches
    // only (docs/contract.md, "Input events"), so a conversion carrying an
    // interaction this schema does not know is accepted in both encodings.
    let p = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("regressions/event_protobuf/conversion_unknown_interaction.bin");
    let ev = apportion_wire::decode_event_protobuf(&std::fs::read(p).unwrap(), usize::MAX).unwrap();
    assert_eq!(ev.kind, EventKind::Conversion);
    let json = r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":0,"interaction":"sideways"}"#;
    assert!(parse_event(json.as_bytes()).is_ok());
}

#[test]
fn runs_split_at_long_gaps_and_pending_conversions() {
    // Derived by hand from docs/contract.md "Touch cap": expiry 10 ms, touches
    // at 0, 1 and 100 make runs of 2 and 1; a pending conversion at 0 (after
    // the first touch in arrival order) splits the first run.
    let t = |ts: i64, seq: u64| match touch(UserKey([1; 32]), seq, ts, "email", false).kind {
        JourneyEventKind::Touch(t) => t,
        _ => unreachable!(),
    };
    let touches = [t(0, 1), t(1, 3), t(100, 4)];
    assert_eq!(runs(&touches, &[], 10), vec![2, 1]);
    let c = Conversion { event_id: "c".into(), ts: 0, seq: 2, goal: "g".into(), value: None, currency: None };
    assert_eq!(runs(&touches, &[c], 10), vec![1, 1, 1]);
    assert_eq!(runs(&[], &[], 10), Vec::<usize>::new());
}
