//! # apportion
//!
//! The binary: command line and exit codes. Everything it runs lives in the
//! libraries: `apportion-engine` (pure decisions), `apportion-store` (sled),
//! `apportion-sinks`, and `apportion-serve` (configuration, the streaming
//! core, `replay` over a file). Each command is a module of [`cmd`] that
//! wires them.
//!
//! Exit codes: 0 success, 1 runtime error, 2 usage error.
#![forbid(unsafe_code)]

mod cmd;

use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Result;
use apportion_contract::ModelId;
use apportion_serve::replay_file::ReplayIo;
use clap::{Args, Parser, Subcommand};

use cmd::{apply_flags, load_config, pseudonymizer, ModelFlags};

/// mimalloc instead of the system allocator: the per-event path still
/// allocates (owned strings of parsed events, output rows), and glibc's
/// malloc and free showed up as 12 to 25 % of the profiles (load/RESULTS.md).
#[global_allocator]
static GLOBAL: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Conversion credit you own: multi-touch attribution on your own event stream.
#[derive(Parser, Debug)]
#[command(name = "apportion", version, about, propagate_version = true)]
struct Cli {
    /// TOML configuration file (see `apportion config --print-default`).
    #[arg(long, global = true, value_name = "FILE")]
    config: Option<PathBuf>,

    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Credit every conversion of an NDJSON input, in event-time order.
    Replay(ReplayArgs),
    /// Run the example trail shop's invented scenario and print credit per channel and model.
    Demo(DemoArgs),
    /// Show the fitted shapley and markov models, and why one conversion got its credit.
    Explain(ExplainArgs),
    /// Compare models on credit and path rows: totals, shifts, bootstrap intervals, lift tests.
    Compare(cmd::compare::CompareArgs),
    /// Run the streaming service (Kafka, or embedded HTTP/file input without a [kafka] section).
    Serve,
    /// Show or check the configuration.
    Config(ConfigArgs),
    /// Show the store's partitions, or reset a partition's watermark (service stopped).
    #[command(subcommand)]
    State(cmd::state::StateCommand),
    /// Exit 0 when an HTTP URL answers 200 (container healthcheck).
    Health {
        /// URL to check.
        #[arg(long, default_value = "http://127.0.0.1:9464/healthz")]
        url: String,
    },
}

#[derive(Args, Debug)]
struct ReplayArgs {
    /// NDJSON input file, or - for stdin.
    #[arg(long, value_name = "PATH|-")]
    input: String,
    /// Where credit rows go (NDJSON), or - for stdout.
    #[arg(long, value_name = "PATH|-")]
    output: String,
    /// Where rejected lines go (line number, reason, detail as NDJSON).
    #[arg(long, value_name = "PATH")]
    rejected: Option<PathBuf>,
    /// Where closed paths go (NDJSON).
    #[arg(long, value_name = "PATH")]
    paths: Option<PathBuf>,
    /// No progress bar and no summary.
    #[arg(long)]
    quiet: bool,
    #[command(flatten)]
    flags: ModelFlags,
}

#[derive(Args, Debug)]
struct ExplainArgs {
    /// NDJSON input file, or - for stdin.
    #[arg(long, value_name = "PATH|-")]
    input: String,
    /// Explain this conversion (its event_id) under every model.
    #[arg(long, value_name = "ID")]
    conversion: Option<String>,
    /// Machine-readable JSON on stdout.
    #[arg(long)]
    json: bool,
    #[command(flatten)]
    flags: ModelFlags,
}

#[derive(Args, Debug)]
struct DemoArgs {
    /// Directory for the generated events and the credit rows.
    #[arg(long, value_name = "DIR", default_value = "apportion-demo")]
    out_dir: PathBuf,
    /// Number of shoppers.
    #[arg(long, default_value_t = 3000)]
    users: u32,
    /// Seed of the scenario.
    #[arg(long, default_value_t = 7)]
    seed: u64,
    /// Models (default: all seven).
    #[arg(long, value_name = "LIST")]
    models: Option<String>,
}

#[derive(Args, Debug)]
struct ConfigArgs {
    /// Print the documented default configuration file.
    #[arg(long)]
    print_default: bool,
    /// Print the effective configuration (file + environment) as TOML.
    #[arg(long)]
    print_effective: bool,
}

fn run(cli: Cli) -> Result<()> {
    let file = cli.config.as_deref();
    match cli.command {
        Command::Config(a) => {
            let cfg = if a.print_default { None } else { Some(load_config(file)?) };
            let opts = cmd::config::ConfigOpts { print_default: a.print_default, print_effective: a.print_effective };
            cmd::config::run(cfg, opts)
        }
        Command::Replay(a) => {
            let mut cfg = load_config(file)?;
            apply_flags(&mut cfg, &a.flags)?;
            let io =
                ReplayIo { input: a.input, output: a.output, paths: a.paths, rejected: a.rejected, progress: !a.quiet };
            cmd::replay::run(io, &cfg, a.quiet)
        }
        Command::Demo(a) => {
            let mut cfg = load_config(file)?;
            cfg.models = match &a.models {
                Some(m) => ModelId::parse_list(m)?,
                None => ModelId::ALL.to_vec(),
            };
            cfg.validate()?;
            let pseudo = pseudonymizer(&cfg);
            cmd::demo::run(&cfg, pseudo, &a.out_dir, a.users, a.seed)
        }
        Command::Explain(a) => {
            let mut cfg = load_config(file)?;
            if a.flags.models.is_none() {
                cfg.models = ModelId::ALL.to_vec();
            }
            apply_flags(&mut cfg, &a.flags)?;
            let pseudo = pseudonymizer(&cfg);
            cmd::explain::run(&a.input, a.conversion.as_deref(), a.json, &cfg, &pseudo)
        }
        Command::Compare(a) => cmd::compare::run(&a),
        Command::Serve => cmd::serve::run(load_config(file)?),
        Command::State(c) => cmd::state::run(&load_config(file)?, c),
        Command::Health { url } => cmd::health::run(&url),
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() { ExitCode::from(2) } else { ExitCode::SUCCESS };
        }
    };
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
