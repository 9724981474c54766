//! The output of `apportion replay` pinned on two 100k-event generated
//! inputs, so that a rebuild of the state layer or the hot path (issue 11)
//! cannot change a byte of it (docs/contract.md, "Determinism").
//!
//! Source of the check values: SHA-256 digests of the output of the build
//! at commit d3c83ff (before the state-layer rebuild), recorded with the
//! same generator seeds, arguments and pseudonymization key. They are not
//! derived from first principles; the credit itself is checked against
//! outside sources by the engine's tests. A change that alters output on
//! purpose (a contract change) must say so and re-record them.

use std::path::Path;

use apportion_e2e::{apportion, KEY};
use apportion_load::gen::{generate, GenOptions};
use apportion_load::scenario::Scenario;
use sha2::{Digest, Sha256};

fn sha256_file(p: &Path) -> String {
    let bytes = std::fs::read(p).unwrap();
    Sha256::digest(&bytes).iter().map(|b| format!("{b:02x}")).collect()
}

struct Pin {
    /// Generator seed and time order.
    seed: u64,
    unsorted: bool,
    /// Digest of the generated input (a generator change, not an engine
    /// change, fails here first).
    input: &'static str,
    args: &'static [&'static str],
    credit: &'static str,
    paths: &'static str,
}

const EMPTY: &str = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855";

fn check(pin: &Pin) {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.ndjson");
    let mut opts = GenOptions::new(100_000, 10_000, pin.seed);
    opts.unsorted = pin.unsorted;
    let f = std::io::BufWriter::new(std::fs::File::create(&input).unwrap());
    generate(&Scenario::example_shop(), &opts, f).unwrap();
    assert_eq!(sha256_file(&input), pin.input, "the generated input changed (load/src/gen.rs), not the replay output");
    let (credit, paths, rejected) =
        (dir.path().join("credit.ndjson"), dir.path().join("paths.ndjson"), dir.path().join("rejected.ndjson"));
    let o = apportion()
        .args(["replay", "--quiet", "--input"])
        .arg(&input)
        .arg("--output")
        .arg(&credit)
        .arg("--paths")
        .arg(&paths)
        .arg("--rejected")
        .arg(&rejected)
        .args(pin.args)
        .env("APPORTION_PSEUDONYM_KEY", KEY)
        .output()
        .unwrap();
    assert!(o.status.success(), "replay failed: {}", String::from_utf8_lossy(&o.stderr));
    assert_eq!(sha256_file(&credit), pin.credit, "credit rows differ from the pinned output");
    assert_eq!(sha256_file(&paths), pin.paths, "path rows differ from the pinned output");
    assert_eq!(sha256_file(&rejected), EMPTY, "generated input has no invalid line");
}

#[test]
fn replay_output_of_all_seven_models_is_unchanged_on_100k_sorted_events() {
    check(&Pin {
        seed: 7,
        unsorted: false,
        input: "0eb7a2f4f3756ea1e7c0f1f3ad3231ded9e4cd816c430e07c126a3e776abab13",
        args: &["--models", "last_touch,first_touch,linear,time_decay,u_shaped,shapley,markov"],
        credit: "5221b57c279cab11708b4b2a981e5745bea18354adc2ae904136c61727d97fae",
        paths: "d0121b20e9879d34f1de35ef83c28a4abdf233bec83502df0029331700981a6a",
    });
}

#[test]
fn replay_output_of_the_rule_models_is_unchanged_on_100k_unsorted_events() {
    check(&Pin {
        seed: 8,
        unsorted: true,
        input: "616f0b977e9b38767cb7c1f83de151225bff99382eefae9620f07b2a9369275c",
        args: &["--models", "last_touch,first_touch,linear,time_decay,u_shaped", "--view-lookback", "7d"],
        credit: "f6d45be56e8cefc8f79a3d30fd9b5269656b65fa57e1ee21b89eb0337d4f7504",
        paths: "31ff7c2bed403b2ba1c1a29b94a48d7db1f94e2db3bfb52eb5c087e453ddc63e",
    });
}
