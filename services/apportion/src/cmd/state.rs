//! `apportion state`: the store's partitions, and resetting a watermark.

use std::path::PathBuf;

use anyhow::{Context, Result};
use apportion_contract::time::{format_ms, parse_rfc3339_ms};
use apportion_serve::config::Config;
use apportion_serve::state_admin;

/// What to do.
#[derive(clap::Subcommand, Debug)]
pub enum StateCommand {
    /// Every partition: committed offset, watermark, open journeys, snapshot.
    Show {
        /// Machine-readable JSON on stdout.
        #[arg(long)]
        json: bool,
    },
    /// Sets a partition's watermark (the service must be stopped).
    ResetWatermark {
        /// The partition, as `show` names it (e.g. events/3, file/0).
        #[arg(long, value_name = "NAME")]
        partition: String,
        /// The new watermark: an RFC 3339 time, or `now`.
        #[arg(long, value_name = "TIME|now")]
        to: String,
    },
}

fn data_dir(cfg: &Config) -> PathBuf {
    cfg.data_dir().unwrap_or_else(|| PathBuf::from("apportion-data"))
}

/// Runs the command.
pub fn run(cfg: &Config, cmd: StateCommand) -> Result<()> {
    let dir = data_dir(cfg);
    match cmd {
        StateCommand::Show { json } => {
            let parts = state_admin::show(&dir)?;
            if json {
                println!("{}", serde_json::to_string_pretty(&parts)?);
                return Ok(());
            }
            println!("{:<28}{:>14}{:>27}{:>10}{:>10}", "partition", "offset", "watermark", "journeys", "pending");
            for p in parts {
                println!(
                    "{:<28}{:>14}{:>27}{:>10}{:>10}",
                    p.partition,
                    p.offset.map_or("-".into(), |o| o.to_string()),
                    p.watermark.unwrap_or_else(|| "-".into()),
                    p.open_journeys,
                    p.pending_decisions
                );
            }
        }
        StateCommand::ResetWatermark { partition, to } => {
            let ms = if to == "now" {
                std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH)?.as_millis() as i64
            } else {
                parse_rfc3339_ms(&to).with_context(|| format!("--to {to:?} is neither an RFC 3339 time nor `now`"))?
            };
            let (old, new) = state_admin::reset_watermark(&dir, &partition, ms)?;
            let show = |t: i64| if t == i64::MIN { "-".to_string() } else { format_ms(t) };
            eprintln!("{partition}: watermark {} -> {}", show(old.watermark), show(new.watermark));
        }
    }
    Ok(())
}
