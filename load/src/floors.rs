//! Floors for orientation (issue 11, benchmark part e): how fast the two
//! unavoidable steps of every event go on their own, on the same records
//! the service reads.
//!
//! - **borrowed parse**: `serde_json::from_slice` into [`Borrowed`], whose
//!   string fields borrow from the line (no allocation), no validation;
//! - **HMAC-SHA256** of the user id with a key set up once (each id clones
//!   the keyed state, as the service's pseudonymizer does), without the hex
//!   encoding of the result;
//! - **service parse**: the service's own parser and validator
//!   (`parse_event`, owned strings), for comparison.
//!
//! The input is read into memory once and split into lines before any
//! timing; user ids for the HMAC are taken from a parse done before timing
//! too. Each floor runs whole passes over the lines until `min_secs` have
//! passed, and every result goes through [`std::hint::black_box`] so that
//! nothing is optimized away.

use std::hint::black_box;
use std::time::{Duration, Instant};

use hmac::{Hmac, Mac};
use serde::Deserialize;
use sha2::Sha256;

use crate::LoadError;

/// The contract's fields, borrowed from the line. Unknown fields are
/// ignored. Fails on a string with escapes (the generator writes none).
#[derive(Debug, Deserialize)]
pub struct Borrowed<'a> {
    /// `type`.
    #[serde(borrow, rename = "type")]
    pub kind: &'a str,
    /// `event_id`.
    #[serde(borrow)]
    pub event_id: &'a str,
    /// `user_id`.
    #[serde(borrow)]
    pub user_id: &'a str,
    /// `timestamp` (not converted).
    #[serde(borrow)]
    pub timestamp: &'a str,
    /// `channel`.
    #[serde(borrow, default)]
    pub channel: Option<&'a str>,
    /// `campaign`.
    #[serde(borrow, default)]
    pub campaign: Option<&'a str>,
    /// `interaction`.
    #[serde(borrow, default)]
    pub interaction: Option<&'a str>,
    /// `goal`.
    #[serde(borrow, default)]
    pub goal: Option<&'a str>,
    /// `value`.
    #[serde(default)]
    pub value: Option<f64>,
    /// `currency`.
    #[serde(borrow, default)]
    pub currency: Option<&'a str>,
}

/// One floor's result.
#[derive(Debug, Clone, PartialEq)]
pub struct Floor {
    /// What was timed.
    pub name: &'static str,
    /// Records per pass.
    pub records: usize,
    /// Whole passes timed.
    pub passes: u64,
    /// Time of all passes.
    pub elapsed: Duration,
}

impl Floor {
    /// Records per second over all passes.
    pub fn per_second(&self) -> f64 {
        (self.records as u64 * self.passes) as f64 / self.elapsed.as_secs_f64().max(1e-9)
    }
}

/// The non-empty lines of `text` (a trailing `\r` removed).
pub fn lines(text: &[u8]) -> Vec<&[u8]> {
    text.split(|b| *b == b'\n')
        .map(|l| l.strip_suffix(b"\r").unwrap_or(l))
        .filter(|l| !l.iter().all(u8::is_ascii_whitespace))
        .collect()
}

fn timed(name: &'static str, records: usize, min_secs: f64, mut pass: impl FnMut()) -> Floor {
    let started = Instant::now();
    let mut passes = 0;
    loop {
        pass();
        passes += 1;
        if started.elapsed().as_secs_f64() >= min_secs {
            break;
        }
    }
    Floor { name, records, passes, elapsed: started.elapsed() }
}

/// Times the floors over `lines` (see the module docs); `key` is the HMAC key.
pub fn measure(lines: &[&[u8]], key: &[u8], min_secs: f64) -> Result<Vec<Floor>, LoadError> {
    // Untimed: every line must parse, and the user ids for the HMAC.
    let mut users: Vec<&str> = Vec::with_capacity(lines.len());
    for (n, l) in lines.iter().enumerate() {
        let e: Borrowed<'_> = serde_json::from_slice(l)
            .map_err(|e| LoadError::Scenario(format!("line {}: not a borrowable event: {e}", n + 1)))?;
        users.push(e.user_id);
    }
    let n = lines.len();
    let parse = timed("serde_json borrowed parse", n, min_secs, || {
        for l in lines {
            let e: Result<Borrowed<'_>, _> = serde_json::from_slice(black_box(l));
            let _ = black_box(e);
        }
    });
    let keyed = Hmac::<Sha256>::new_from_slice(key).expect("HMAC accepts keys of any length");
    let hmac = timed("HMAC-SHA256 of user_id", n, min_secs, || {
        for u in &users {
            let mut mac = keyed.clone();
            mac.update(black_box(u.as_bytes()));
            black_box(mac.finalize().into_bytes());
        }
    });
    let service = timed("service parse_event (owned, validated)", n, min_secs, || {
        for l in lines {
            let _ = black_box(apportion_engine::contract::parse_event(black_box(l)));
        }
    });
    Ok(vec![parse, hmac, service])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn borrowed_parse_reads_the_generators_lines() {
        let mut buf = Vec::new();
        crate::gen::generate(
            &crate::scenario::Scenario::example_shop(),
            &crate::gen::GenOptions::new(500, 50, 1),
            &mut buf,
        )
        .unwrap();
        let ls = lines(&buf);
        assert_eq!(ls.len(), 500);
        let e: Borrowed<'_> = serde_json::from_slice(ls[0]).unwrap();
        assert!(e.user_id.starts_with("sim-user-"));
        let f = measure(&ls, b"k", 0.0).unwrap();
        assert_eq!(f.len(), 3);
        assert!(f.iter().all(|f| f.passes == 1 && f.records == 500));
    }
}
