//! Builds the configured models, fitting the data-driven ones on path
//! statistics when given.

use anyhow::{bail, Result};
use apportion_engine::datadriven::{MarkovModel, PathStats, ShapleyModel};
use apportion_engine::registry::rule_model;
use apportion_engine::Model;

use crate::config::Config;

/// The models named in `cfg.models`, in order. Data-driven models need
/// `stats` (an empty fit credits every conversion with the linear fallback).
pub fn build_models(cfg: &Config, stats: Option<&PathStats>) -> Result<Vec<Box<dyn Model>>> {
    let params = cfg.rule_params();
    let empty = PathStats::new(cfg.markov_order);
    let stats = stats.unwrap_or(&empty);
    let mut out: Vec<Box<dyn Model>> = Vec::new();
    for name in &cfg.models {
        let m: Box<dyn Model> = match name.as_str() {
            "shapley" => Box::new(ShapleyModel::fit(stats)),
            "markov" => Box::new(MarkovModel::fit(stats)),
            other => match rule_model(other, &params) {
                Some(m) => m,
                None => bail!("unknown model {other:?}"),
            },
        };
        out.push(m);
    }
    Ok(out)
}
