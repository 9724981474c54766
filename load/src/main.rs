//! `apportion-load`: the ground-truth simulator, the model scoring and the
//! load generator on the command line (see load/README.md).
#![forbid(unsafe_code)]

use std::fs::File;
use std::io::{BufReader, BufWriter, Read};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Instant;

use anyhow::{bail, Context, Result};
use apportion_load::floors;
use apportion_load::gen::{generate, GenOptions};
use apportion_load::groundtruth::{credit_in_process, credit_with_binary, score, Report, Run, ALL_MODELS};
use apportion_load::scenario::Scenario;
use apportion_load::simulate::{simulate, SimOptions};
use clap::{Parser, Subcommand};

/// Synthetic inputs with a known answer, model scoring and load generation for apportion.
#[derive(Parser, Debug)]
#[command(name = "apportion-load", version, about)]
struct Cli {
    #[command(subcommand)]
    command: Cmd,
}

#[derive(Subcommand, Debug)]
enum Cmd {
    /// Simulate users of the ground-truth scenario; write events (and the truth).
    Simulate {
        /// Number of users (one journey each).
        #[arg(long)]
        users: u64,
        /// Seed.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Events file (NDJSON, the input contract).
        #[arg(long, value_name = "PATH")]
        out: PathBuf,
        /// Ground-truth file (JSON): configured effects and true incremental conversions.
        #[arg(long, value_name = "PATH")]
        truth: Option<PathBuf>,
        /// Journeys start uniformly over this many days.
        #[arg(long, default_value_t = 60)]
        days: u32,
    },
    /// Simulate, credit under every model and score the models against the truth.
    Groundtruth {
        /// Users per run.
        #[arg(long, default_value_t = 50_000)]
        users: u64,
        /// Seed of the first run; run k uses seed + k.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Number of runs (seeds).
        #[arg(long, default_value_t = 1)]
        runs: u64,
        /// Also write the tables (Markdown) here.
        #[arg(long, value_name = "PATH")]
        out_md: Option<PathBuf>,
        /// Also write every run (truth, scores) as JSON here.
        #[arg(long, value_name = "PATH")]
        out_json: Option<PathBuf>,
        /// The apportion binary (default: target/release/apportion of this workspace).
        #[arg(long, value_name = "PATH")]
        bin: Option<PathBuf>,
        /// Credit in process with the engine instead of running the binary.
        #[arg(long, conflicts_with = "cross_check")]
        in_process: bool,
        /// Credit both ways and report the largest difference.
        #[arg(long)]
        cross_check: bool,
        /// Models to score (default: all seven).
        #[arg(long, value_name = "LIST")]
        models: Option<String>,
    },
    /// Stream a large, realistic input for load tests.
    Gen {
        /// Lines to write (duplicate deliveries included).
        #[arg(long)]
        events: u64,
        /// Distinct user ids.
        #[arg(long)]
        users: u64,
        /// Seed.
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Output file.
        #[arg(long, value_name = "PATH")]
        out: PathBuf,
        /// Write each journey whole (out of time order) instead of time-sorted.
        #[arg(long)]
        unsorted: bool,
        /// Journeys start over this many days.
        #[arg(long, default_value_t = 180)]
        days: u32,
        /// Probability that a line is delivered twice.
        #[arg(long, default_value_t = 0.001)]
        dup_rate: f64,
        /// No conversion lines, and journey k goes to user k mod --users: every
        /// user id ends with an open journey once journeys >= users (about
        /// 3.8 lines per journey).
        #[arg(long)]
        open_journeys: bool,
    },
    /// Floors for orientation: borrowed serde_json parse and HMAC-SHA256 of the
    /// user ids over the lines of a file, in records/s (printed as TSV).
    Floors {
        /// NDJSON input (read into memory once, before timing).
        #[arg(long, value_name = "PATH")]
        input: PathBuf,
        /// Time whole passes over the input until this many seconds have passed, per floor.
        #[arg(long, default_value_t = 2.0)]
        min_seconds: f64,
    },
}

fn default_bin() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..").join("target").join("release").join("apportion")
}

fn create(path: &Path) -> Result<BufWriter<File>> {
    let f = File::create(path).with_context(|| format!("cannot create {}", path.display()))?;
    Ok(BufWriter::with_capacity(1 << 20, f))
}

#[allow(clippy::too_many_arguments)]
fn groundtruth(
    users: u64,
    seed: u64,
    runs: u64,
    out_md: Option<PathBuf>,
    out_json: Option<PathBuf>,
    bin: Option<PathBuf>,
    in_process: bool,
    cross_check: bool,
    models: Option<String>,
) -> Result<()> {
    let models: Vec<String> = match models {
        Some(m) => apportion_engine::ModelId::parse_list(&m)?.iter().map(|m| m.to_string()).collect(),
        None => ALL_MODELS.iter().map(|s| s.to_string()).collect(),
    };
    let models: Vec<&str> = models.iter().map(String::as_str).collect();
    let bin = bin.unwrap_or_else(default_bin);
    if !in_process && !bin.exists() {
        bail!("{} not found: build it with `cargo build --release -p apportion` or pass --bin", bin.display());
    }
    let scenario = Scenario::example_shop();
    let mut report = Report {
        runs: Vec::new(),
        method: if in_process {
            "the engine in process (replay_lines)".into()
        } else {
            format!("`apportion replay` ({})", bin.file_name().unwrap_or_default().to_string_lossy())
        },
    };
    for k in 0..runs {
        let s = seed + k;
        let dir = tempfile::tempdir().context("creating a temporary directory")?;
        let events = dir.path().join("events.ndjson");
        let t0 = Instant::now();
        let truth = {
            let mut w = create(&events)?;
            let t = simulate(&scenario, &SimOptions::new(users, s), &mut w)?;
            w.into_inner().map_err(|e| e.into_error())?.sync_all()?;
            t
        };
        let t1 = Instant::now();
        let read_lines = || -> Result<String> {
            let mut text = String::new();
            BufReader::new(File::open(&events)?).read_to_string(&mut text)?;
            Ok(text)
        };
        let (totals, check) = if in_process {
            let text = read_lines()?;
            let lines: Vec<&str> = text.lines().collect();
            (credit_in_process(&lines, &models), None)
        } else {
            let totals = credit_with_binary(&bin, &events, dir.path(), &models)?;
            let check = if cross_check {
                let text = read_lines()?;
                let lines: Vec<&str> = text.lines().collect();
                Some(totals.max_abs_diff(&credit_in_process(&lines, &models)))
            } else {
                None
            };
            (totals, check)
        };
        let scores = score(&truth, &totals, &models);
        eprintln!(
            "seed {s}: {} users, {} events, {} conversions; simulated in {:.2}s, credited and scored in {:.2}s{}",
            truth.users,
            truth.events,
            truth.conversions,
            (t1 - t0).as_secs_f64(),
            t1.elapsed().as_secs_f64(),
            check.map(|d| format!(", cross-check max diff {d:.3e}")).unwrap_or_default()
        );
        report.runs.push(Run { truth, scores, cross_check_max_abs_diff: check });
    }
    let md = report.markdown();
    print!("{md}");
    if let Some(p) = out_md {
        std::fs::write(&p, &md).with_context(|| format!("writing {}", p.display()))?;
    }
    if let Some(p) = out_json {
        std::fs::write(&p, serde_json::to_vec_pretty(&report)?).with_context(|| format!("writing {}", p.display()))?;
    }
    Ok(())
}

fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Cmd::Simulate { users, seed, out, truth, days } => {
            let started = Instant::now();
            let mut w = create(&out)?;
            let t = simulate(&Scenario::example_shop(), &SimOptions { days, ..SimOptions::new(users, seed) }, &mut w)?;
            w.into_inner().map_err(|e| e.into_error())?;
            if let Some(p) = truth {
                std::fs::write(&p, serde_json::to_vec_pretty(&t)?)
                    .with_context(|| format!("writing {}", p.display()))?;
            }
            eprintln!(
                "simulate: {} users, {} events ({} touches, {} conversions) in {:.2}s",
                t.users,
                t.events,
                t.touches,
                t.conversions,
                started.elapsed().as_secs_f64()
            );
            Ok(())
        }
        Cmd::Groundtruth { users, seed, runs, out_md, out_json, bin, in_process, cross_check, models } => {
            groundtruth(users, seed, runs.max(1), out_md, out_json, bin, in_process, cross_check, models)
        }
        Cmd::Gen { events, users, seed, out, unsorted, days, dup_rate, open_journeys } => {
            let started = Instant::now();
            let opts = GenOptions { unsorted, days, dup_rate, open_journeys, ..GenOptions::new(events, users, seed) };
            let mut w = create(&out)?;
            let s = generate(&Scenario::example_shop(), &opts, &mut w)?;
            w.into_inner().map_err(|e| e.into_error())?;
            let secs = started.elapsed().as_secs_f64();
            let bytes = std::fs::metadata(&out).map(|m| m.len()).unwrap_or(0);
            eprintln!(
                "gen: {} lines ({} touches, {} conversions, {} duplicates), {} journeys{}, {:.1} MB, {} in {:.2}s ({:.0} lines/s)",
                s.lines,
                s.touches,
                s.conversions,
                s.duplicates,
                s.journeys,
                if open_journeys { format!(" ({} users left with an open journey)", s.open_users) } else { String::new() },
                bytes as f64 / 1e6,
                if unsorted { "unsorted".to_string() } else { format!("time-sorted, at most {} pending", s.max_pending) },
                secs,
                s.lines as f64 / secs.max(1e-9)
            );
            Ok(())
        }
        Cmd::Floors { input, min_seconds } => {
            let text = std::fs::read(&input).with_context(|| format!("reading {}", input.display()))?;
            let lines = floors::lines(&text);
            if lines.is_empty() {
                bail!("{} has no lines", input.display());
            }
            let key = std::env::var("APPORTION_PSEUDONYM_KEY").unwrap_or_else(|_| "apportion-load-floors-key".into());
            let results = floors::measure(&lines, key.as_bytes(), min_seconds)?;
            println!("floor\trecords\tpasses\tseconds\trecords_per_s");
            for f in &results {
                println!(
                    "{}\t{}\t{}\t{:.3}\t{:.0}",
                    f.name,
                    f.records,
                    f.passes,
                    f.elapsed.as_secs_f64(),
                    f.per_second()
                );
            }
            Ok(())
        }
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
