//! `apportion compare`: which channels (or campaigns) gain or lose credit
//! when one attribution model replaces another, by how much, and how sure
//! we are. Argument handling only; the work is in `apportion-report`.
//!
//! It reads the credit rows (and, for the bootstrap, the path rows) that
//! `replay` and `serve` write, so the service need not run.

use std::io::Write;
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use apportion_report::bootstrap::{BootstrapOptions, DEFAULT_RESAMPLES, DEFAULT_SEED};
use apportion_report::render::{render, Format};
use apportion_report::{build_report, GroupBy, ReportInputs};
use clap::Args;

use apportion_serve::output::OutputFile;

/// `apportion compare` arguments.
#[derive(Args, Debug)]
pub struct CompareArgs {
    /// Credit rows: an NDJSON file, a directory of rotated credit-*.ndjson files, or Parquet (a file, the sink's
    /// directory or a date-partitioned credit/ tree). Several may follow.
    #[arg(long, value_name = "PATH", num_args = 1.., required = true)]
    credits: Vec<PathBuf>,
    /// Closed paths (the same kinds of PATH, paths-*.ndjson in a directory): adds bootstrap intervals for the shares
    /// of shapley and markov.
    #[arg(long, value_name = "PATH", num_args = 1..)]
    paths: Vec<PathBuf>,
    /// Group credit by channel or by campaign (channel / campaign).
    #[arg(long, value_name = "channel|campaign", default_value = "channel")]
    by: GroupBy,
    /// The model the others are compared with (default: last_touch when present).
    #[arg(long, value_name = "MODEL")]
    baseline: Option<String>,
    /// Output format.
    #[arg(long, value_name = "table|csv|json|html", default_value = "table")]
    format: Format,
    /// Write the report here (written whole, then moved into place) instead of stdout.
    #[arg(long, value_name = "FILE")]
    output: Option<PathBuf>,
    /// Lift tests to compare credit with (CSV: channel,start,end,incremental_conversions,std_error|low,high,source).
    #[arg(long, value_name = "FILE")]
    experiments: Option<PathBuf>,
    /// Bootstrap resamples.
    #[arg(long, value_name = "N", default_value_t = DEFAULT_RESAMPLES)]
    resamples: usize,
    /// Seed of the bootstrap (same seed, same intervals).
    #[arg(long, value_name = "S", default_value_t = DEFAULT_SEED)]
    seed: u64,
    /// Markov order of the bootstrap's refit (default: the order in the markov rows' model_version, else 1).
    #[arg(long, value_name = "K")]
    markov_order: Option<usize>,
    /// Threads for the bootstrap (default: every core; the result does not depend on it).
    #[arg(long, value_name = "N")]
    threads: Option<usize>,
}

fn write_out(text: &str, output: Option<&Path>) -> Result<()> {
    let target = output.map_or_else(|| "-".to_string(), |p| p.to_string_lossy().into_owned());
    let mut f = OutputFile::create(&target)?;
    f.write_all(text.as_bytes()).context("writing the report")?;
    f.commit()
}

/// Runs `apportion compare`.
pub fn run(a: &CompareArgs) -> Result<()> {
    let mut bootstrap = BootstrapOptions { resamples: a.resamples, seed: a.seed, ..BootstrapOptions::default() };
    if let Some(t) = a.threads {
        bootstrap.threads = t;
    }
    let inputs = ReportInputs {
        credits: a.credits.clone(),
        paths: a.paths.clone(),
        experiments: a.experiments.clone(),
        by: a.by,
        baseline: a.baseline.clone(),
        bootstrap,
        markov_order: a.markov_order,
    };
    let report = build_report(&inputs)?;
    write_out(&render(&report, a.format), a.output.as_deref())?;
    if let Some(p) = &a.output {
        eprintln!("compare: wrote {}", p.display());
    }
    Ok(())
}

/// The HTML report of the credit and path rows in `dir` (as `apportion
/// compare --credits DIR --paths DIR --format html`), written to `output`.
pub fn html_report(dir: &Path, output: &Path) -> Result<()> {
    let inputs =
        ReportInputs { credits: vec![dir.to_path_buf()], paths: vec![dir.to_path_buf()], ..ReportInputs::default() };
    let report = build_report(&inputs)?;
    write_out(&render(&report, Format::Html), Some(output))
}
