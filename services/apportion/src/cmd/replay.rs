//! `apportion replay`: credit an NDJSON input and print a summary.

use anyhow::Result;
use apportion_serve::config::Config;
use apportion_serve::replay_file::{self, ReplayIo};

/// Runs replay and prints the summary on stderr (unless `quiet`).
pub fn run(io: ReplayIo, cfg: &Config, quiet: bool) -> Result<()> {
    let pseudo = super::pseudonymizer(cfg);
    let s = replay_file::run(&io, cfg, &pseudo)?;
    if !quiet {
        eprintln!(
            "replay: {} lines, {} events applied, {} conversions ({} unattributed), {} rejected, {} duplicates, {} without consent, {} credit rows, {} paths in {:.2}s",
            s.lines, s.events, s.conversions, s.unattributed, s.rejected, s.duplicates, s.without_consent, s.rows, s.paths, s.seconds
        );
        if s.spilled > 0 {
            eprintln!(
                "replay: open journeys outgrew cache_bytes ({} bytes): {} journey writes went to the sled store (slower; raise cache_bytes if memory allows)",
                cfg.cache_bytes, s.spilled
            );
        }
    }
    Ok(())
}
