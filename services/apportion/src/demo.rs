//! `apportion demo`: an invented business, end to end.
//!
//! Ridgeline Outfitters is a made-up online shop for outdoor gear. The demo
//! generates two months of its marketing touches and orders (seeded, so the
//! same seed gives the same numbers), runs them through the same engine and
//! store as `replay`, and prints what each model credits per channel, side by
//! side. The data is invented for illustration only; it says nothing about
//! any real channel's effect.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use apportion_engine::time_fmt::format_ms;
use apportion_engine::CreditRow;

/// Channels with (relative frequency, campaigns).
const CHANNELS: &[(&str, u32, &[&str])] = &[
    ("paid_search", 30, &["brand-terms", "tents-generic", "boots-generic"]),
    ("email", 20, &["newsletter-weekly", "abandoned-cart", "trail-club"]),
    ("social", 18, &["summit-stories", "gear-reels"]),
    ("display", 14, &["retarget-30d", "camping-season"]),
    ("affiliate", 8, &["hiking-blogs", "review-sites"]),
    ("video", 10, &["gear-reviews", "trail-guides"]),
];

/// A small deterministic generator (xorshift64*), enough for demo data.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

/// Generates the demo events as NDJSON lines.
pub fn generate(users: u32, seed: u64) -> Vec<String> {
    let mut rng = Rng(seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1);
    let start: i64 = 1_772_323_200_000; // 2026-03-01T00:00:00Z
    let day = 86_400_000i64;
    let total_weight: u32 = CHANNELS.iter().map(|c| c.1).sum();
    let mut lines = Vec::new();
    let mut n = 0u64;
    for u in 0..users {
        let user = format!("shopper-{u:05}");
        let touches = 1 + rng.below(6);
        let mut t = start + (rng.unit() * 45.0 * day as f64) as i64;
        let mut lift: f64 = 0.0;
        for _ in 0..touches {
            let mut pick = rng.below(total_weight as u64) as u32;
            let mut ch = CHANNELS[0];
            for c in CHANNELS {
                if pick < c.1 {
                    ch = *c;
                    break;
                }
                pick -= c.1;
            }
            let campaign = ch.2[rng.below(ch.2.len() as u64) as usize];
            let view = ch.0 == "display" || (ch.0 == "video" && rng.unit() < 0.7);
            n += 1;
            lines.push(format!(
                r#"{{"type":"touch","event_id":"rt-{n}","user_id":"{user}","timestamp":"{}","channel":"{}","campaign":"{}","interaction":"{}"}}"#,
                format_ms(t),
                ch.0,
                campaign,
                if view { "view" } else { "click" }
            ));
            // Invented effects, for the demo only.
            lift += match ch.0 {
                "email" => 0.10,
                "paid_search" => 0.08,
                "affiliate" => 0.07,
                "social" => 0.03,
                "video" => 0.03,
                _ => 0.01,
            };
            t += (rng.unit() * 4.0 * day as f64) as i64 + 60_000;
        }
        if rng.unit() < (0.04 + lift).min(0.9) {
            n += 1;
            let value = 20.0 + (rng.unit() * 380.0 * 100.0).round() / 100.0;
            lines.push(format!(
                r#"{{"type":"conversion","event_id":"order-{n}","user_id":"{user}","timestamp":"{}","goal":"purchase","value":{value:.2},"currency":"EUR"}}"#,
                format_ms(t + (rng.unit() * day as f64) as i64)
            ));
        }
    }
    lines
}

/// Writes the demo events to `dir/events.ndjson`.
pub fn write_events(dir: &Path, users: u32, seed: u64) -> Result<PathBuf> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let path = dir.join("events.ndjson");
    let mut f = std::io::BufWriter::new(std::fs::File::create(&path)?);
    for l in generate(users, seed) {
        writeln!(f, "{l}")?;
    }
    f.flush()?;
    Ok(path)
}

/// Totals per (channel, model) from credit rows.
pub fn table(rows: &[CreditRow], models: &[String]) -> String {
    let mut credit: BTreeMap<&str, BTreeMap<&str, (f64, f64)>> = BTreeMap::new();
    let mut conversions = std::collections::BTreeSet::new();
    let mut currency = None;
    for r in rows {
        let e = credit.entry(r.channel.as_str()).or_default().entry(r.model.as_str()).or_default();
        e.0 += r.credit;
        e.1 += r.credited_value.unwrap_or(0.0);
        conversions.insert(r.conversion_id.as_str());
        if currency.is_none() {
            currency = r.currency.clone();
        }
    }
    let mut s = String::new();
    let w = 12usize;
    let header = |s: &mut String, title: &str| {
        s.push_str(&format!("\n{title}\n{:<16}", "channel"));
        for m in models {
            s.push_str(&format!("{:>w$}", m));
        }
        s.push('\n');
    };
    header(&mut s, "Conversions credited per channel (sum of credit)");
    for (ch, per) in &credit {
        s.push_str(&format!("{:<16}", ch));
        for m in models {
            s.push_str(&format!("{:>w$.1}", per.get(m.as_str()).map_or(0.0, |v| v.0)));
        }
        s.push('\n');
    }
    header(&mut s, &format!("Value credited per channel ({})", currency.as_deref().unwrap_or("no currency")));
    for (ch, per) in &credit {
        s.push_str(&format!("{:<16}", ch));
        for m in models {
            s.push_str(&format!("{:>w$.2}", per.get(m.as_str()).map_or(0.0, |v| v.1)));
        }
        s.push('\n');
    }
    s
}
