//! `apportion serve`: the streaming service until SIGTERM/SIGINT.

use anyhow::Result;
use apportion_serve::config::Config;
use apportion_serve::service;

/// Runs the service with the process's termination signals as shutdown.
pub fn run(cfg: Config) -> Result<()> {
    service::run(cfg, service::termination_signal())
}
