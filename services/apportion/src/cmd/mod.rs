//! One module per command; each parses nothing (clap did) and wires the
//! libraries together.

pub mod compare;
pub mod config;
pub mod demo;
pub mod explain;
pub mod health;
pub mod replay;
pub mod serve;
pub mod state;

use std::path::{Path, PathBuf};

use anyhow::Result;
use apportion_contract::{ModelId, Period};
use apportion_engine::Pseudonymizer;
use apportion_serve::config::Config;

/// Model and window flags shared by `replay` and `explain`.
#[derive(clap::Args, Debug)]
pub struct ModelFlags {
    /// Comma-separated models, e.g. last_touch,linear,shapley.
    #[arg(long, value_name = "LIST")]
    pub models: Option<String>,
    /// Lookback window, e.g. 30d.
    #[arg(long, value_name = "DUR")]
    pub lookback: Option<Period>,
    /// Lookback window for views (default: --lookback).
    #[arg(long, value_name = "DUR")]
    pub view_lookback: Option<Period>,
    /// Expiry of an open journey, e.g. 30d.
    #[arg(long, value_name = "DUR")]
    pub expiry: Option<Period>,
    /// time_decay half-life, e.g. 7d.
    #[arg(long, value_name = "DUR")]
    pub half_life: Option<Period>,
    /// Order of the markov chain (1 to 4).
    #[arg(long, value_name = "K")]
    pub markov_order: Option<usize>,
    /// Directory for the sled state (default: a temporary directory).
    #[arg(long, value_name = "DIR")]
    pub data_dir: Option<PathBuf>,
}

/// Defaults, then the file, then `APPORTION_*` variables.
pub fn load_config(file: Option<&Path>) -> Result<Config> {
    Config::load(file, std::env::vars())
}

/// Applies the command-line flags over the configuration.
pub fn apply_flags(cfg: &mut Config, f: &ModelFlags) -> Result<()> {
    if let Some(m) = &f.models {
        cfg.models = ModelId::parse_list(m)?;
    }
    if let Some(v) = f.lookback {
        cfg.lookback = v;
    }
    if let Some(v) = f.view_lookback {
        cfg.view_lookback = Some(v);
    }
    if let Some(v) = f.expiry {
        cfg.expiry = v;
    }
    if let Some(v) = f.half_life {
        cfg.half_life = v;
    }
    if let Some(v) = f.markov_order {
        cfg.markov_order = v;
    }
    if let Some(d) = &f.data_dir {
        cfg.data_dir = Some(d.to_string_lossy().into_owned());
    }
    cfg.validate()
}

/// The pseudonymizer of the configured key; warns on stderr when it is the
/// public development key (`replay`, `explain`, `demo` accept it).
pub fn pseudonymizer(cfg: &Config) -> Pseudonymizer {
    let (key, dev) = cfg.pseudonym_key();
    if dev {
        eprintln!(
            "warning: no pseudonymization key configured (APPORTION_PSEUDONYM_KEY); using the public development key. \
             User keys made with it can be recomputed by anyone: do not use it for real data."
        );
    }
    Pseudonymizer::new(&key)
}
