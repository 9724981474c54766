//! `apportion demo`: an invented business, end to end.
//!
//! The example trail shop is a made-up online shop for outdoor gear. The demo
//! generates two months of its marketing touches and orders (seeded, so the
//! same seed gives the same numbers), runs them through the streaming
//! service's own processing loop in-process, and prints what each model
//! credits per channel, side by side. The data is invented for illustration only; it says nothing about
//! any real channel's effect.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};

use std::collections::BTreeSet;
use std::sync::atomic::AtomicBool;
use std::sync::{Arc, Mutex};

use anyhow::{Context, Result};
use apportion_contract::time::format_ms;
use apportion_contract::{CreditRow, ModelId, Period};
use apportion_engine::Pseudonymizer;
use apportion_serve::config::{Config, Format};
use apportion_serve::metrics::Metrics;
use apportion_serve::pipeline::Pipeline;
use apportion_serve::run_loop::{run_loop, Shared};
use apportion_serve::source::{MemorySource, PartId, Payload};
use apportion_sinks::ndjson::NdjsonSink;
use apportion_sinks::Sink;

/// Channels with (relative frequency, campaigns).
const CHANNELS: &[(&str, u32, &[&str])] = &[
    ("paid_search", 30, &["brand-terms", "tents-generic", "boots-generic"]),
    ("email", 20, &["newsletter-weekly", "abandoned-cart", "trail-club"]),
    ("social", 18, &["summit-stories", "gear-clips"]),
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

/// Generates the demo events with their event times (ms).
pub fn generate_timed(users: u32, seed: u64) -> Vec<(i64, String)> {
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
            lines.push((t, format!(
                r#"{{"type":"touch","event_id":"rt-{n}","user_id":"{user}","timestamp":"{}","channel":"{}","campaign":"{}","interaction":"{}"}}"#,
                format_ms(t),
                ch.0,
                campaign,
                if view { "view" } else { "click" }
            )));
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
            let at = t + (rng.unit() * day as f64) as i64;
            lines.push((at, format!(
                r#"{{"type":"conversion","event_id":"order-{n}","user_id":"{user}","timestamp":"{}","goal":"purchase","value":{value:.2},"currency":"EUR"}}"#,
                format_ms(at)
            )));
        }
    }
    lines
}

/// Writes the demo events to `dir/events.ndjson`, in event-time order (as
/// a pipeline would deliver them), and returns them.
pub fn write_events(dir: &Path, users: u32, seed: u64) -> Result<(PathBuf, Vec<String>)> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let path = dir.join("events.ndjson");
    let mut events = generate_timed(users, seed);
    events.sort_by_key(|(t, _)| *t);
    let lines: Vec<String> = events.into_iter().map(|(_, l)| l).collect();
    let mut f = std::io::BufWriter::new(std::fs::File::create(&path)?);
    for l in &lines {
        writeln!(f, "{l}")?;
    }
    f.flush()?;
    Ok((path, lines))
}

/// What the in-process service run produced.
pub struct ServeRun {
    /// Credit rows.
    pub rows: Vec<CreditRow>,
    /// Closed paths.
    pub paths: usize,
    /// Distinct model snapshots of the data-driven models.
    pub snapshots: usize,
}

/// Runs the events through the streaming service's own processing loop
/// in-process: a [`MemorySource`] hands them over in batches of 250 (one
/// partition, as a followed file would), the rows go to rotating NDJSON
/// files in `out_dir`, the data-driven models are refitted after every batch
/// as paths close, and the loop closes every journey when the input ends.
pub fn run_through_serve(cfg: &Config, pseudo: Pseudonymizer, lines: &[String], out_dir: &Path) -> Result<ServeRun> {
    let mut cfg = cfg.clone();
    cfg.allowed_lateness = Period(0);
    cfg.refit_interval = Period(0);
    cfg.batch_size = 250;
    let store = apportion_store::Store::temporary()?;
    let metrics = Metrics::new(prometheus::Registry::new());
    let pipeline = Pipeline::new(cfg, pseudo, store, metrics.clone())?;
    for old in std::fs::read_dir(out_dir)? {
        let p = old?.path();
        let name = p.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        if ["credit-", "paths-", "dead-letter-"].iter().any(|s| name.starts_with(s)) {
            std::fs::remove_file(&p)?;
        }
    }
    let source = MemorySource::new(
        PartId::new("file", 0),
        Payload::Event(Format::Json),
        lines.iter().map(|l| l.as_bytes().to_vec()),
        250,
    );
    let sink = NdjsonSink::open(out_dir, 64 << 20)?;
    let stop = Arc::new(AtomicBool::new(false));
    let shared = Arc::new(Mutex::new(Shared::default()));
    run_loop(pipeline, Box::new(source), vec![Box::new(sink) as Box<dyn Sink>], stop, metrics, shared)?;
    let rows = apportion_sinks::ndjson::read_credit_rows(out_dir)?;
    let snapshots: BTreeSet<&str> = rows.iter().filter_map(|r| r.model_version.as_deref()).collect();
    let paths = read_lines(out_dir, "paths-")?;
    Ok(ServeRun { paths, snapshots: snapshots.len(), rows })
}

/// Number of lines in the files of `dir` whose names start with `stem`.
fn read_lines(dir: &Path, stem: &str) -> Result<usize> {
    let mut n = 0;
    for e in std::fs::read_dir(dir)? {
        let p = e?.path();
        if p.file_name().is_some_and(|f| f.to_string_lossy().starts_with(stem)) {
            n += std::fs::read_to_string(&p)?.lines().count();
        }
    }
    Ok(n)
}

/// Totals per (channel, model) from credit rows.
pub fn table(rows: &[CreditRow], models: &[ModelId]) -> String {
    let mut credit: BTreeMap<&str, BTreeMap<ModelId, (f64, f64)>> = BTreeMap::new();
    let mut conversions = std::collections::BTreeSet::new();
    let mut currency = None;
    for r in rows {
        let e = credit.entry(r.channel.as_str()).or_default().entry(r.model).or_default();
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
            s.push_str(&format!("{:>w$}", m.as_str()));
        }
        s.push('\n');
    };
    header(&mut s, "Conversions credited per channel (sum of credit)");
    for (ch, per) in &credit {
        s.push_str(&format!("{:<16}", ch));
        for m in models {
            s.push_str(&format!("{:>w$.1}", per.get(m).map_or(0.0, |v| v.0)));
        }
        s.push('\n');
    }
    header(&mut s, &format!("Value credited per channel ({})", currency.as_deref().unwrap_or("no currency")));
    for (ch, per) in &credit {
        s.push_str(&format!("{:<16}", ch));
        for m in models {
            s.push_str(&format!("{:>w$.2}", per.get(m).map_or(0.0, |v| v.1)));
        }
        s.push('\n');
    }
    s
}

/// `apportion demo`: generates the scenario, runs it through the service's
/// loop and prints the credit per channel and model.
pub fn run(cfg: &Config, pseudo: Pseudonymizer, out_dir: &Path, users: u32, seed: u64) -> Result<()> {
    let (events, lines) = write_events(out_dir, users, seed)?;
    let run = run_through_serve(cfg, pseudo, &lines, out_dir)?;
    let conversions: BTreeSet<&str> = run.rows.iter().map(|r| r.conversion_id.as_str()).collect();
    let unattributed =
        run.rows.iter().filter(|r| r.path_length == 0).map(|r| r.conversion_id.as_str()).collect::<BTreeSet<_>>().len();
    println!(
        "The example trail shop (an invented outdoor-gear shop): {} shoppers, {} events, {} orders ({} with no eligible touch)",
        users,
        lines.len(),
        conversions.len(),
        unattributed
    );
    println!("Run through the streaming service's processing loop in-process (one partition, events in time order).");
    print!("{}", table(&run.rows, &cfg.models));
    if run.snapshots > 0 {
        println!(
            "\nshapley and markov were refitted after every batch as paths closed ({} snapshots, named in model_version);\n`apportion replay` instead fits once on all paths first.",
            run.snapshots
        );
    }
    println!("\nevents:      {}", events.display());
    println!("credit rows: {}/credit-*.ndjson ({} rows)", out_dir.display(), run.rows.len());
    println!("paths:       {}/paths-*.ndjson ({} closed paths)", out_dir.display(), run.paths);
    let report = write_report(out_dir)?;
    println!("report:      {} (apportion compare, every model against last_touch)", report.display());
    println!("\nCredit is correlational: it is not proof that a channel caused a sale.");
    Ok(())
}

/// Writes the HTML comparison report of the demo's rows and paths
/// (`apportion compare`) as `out_dir/report.html`; returns its path.
pub fn write_report(out_dir: &Path) -> Result<PathBuf> {
    let path = out_dir.join("report.html");
    super::compare::html_report(out_dir, &path)?;
    Ok(path)
}
