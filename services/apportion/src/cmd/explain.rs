//! `apportion explain`: what the fitted data-driven models say, and why a
//! conversion got the credit it got.
//!
//! The fit is the one `replay` makes (every closed path of the input). For
//! the model as a whole it prints, per channel, the Shapley value in the
//! game over all channels, the Markov removal effect and the share each
//! model's numbers imply, with the paths and conversions behind them. For one
//! conversion it prints every model's credit per touch and the terms that
//! produced it: the v(S) values for `shapley`, the removal effects for
//! `markov`.

use std::collections::BTreeMap;

use anyhow::{bail, Result};
use apportion_engine::datadriven::{MarkovExplanation, MarkovModel, ShapleyExplanation, ShapleyModel};
use apportion_engine::model::distinct_channels;
use apportion_engine::replay::two_pass::{self, Pass};
use apportion_engine::{Effect, Outcome, Pseudonymizer, Touch};
use apportion_serve::config::Config;
use apportion_serve::output::Rejected;
use apportion_serve::refit::GLOBAL_SEED;
use apportion_serve::replay_file::{apply_pass, index, ReplayIo, Summary};
use serde::Serialize;

#[derive(Debug, Serialize)]
struct ChannelRow {
    channel: String,
    paths: u64,
    converting_paths: u64,
    shapley_value: f64,
    shapley_std_error: Option<f64>,
    shapley_share: f64,
    removal_effect: f64,
    markov_share: f64,
}

#[derive(Debug, Serialize)]
struct TouchCredit {
    position: usize,
    touch_event_id: String,
    channel: String,
    credit: BTreeMap<String, f64>,
}

#[derive(Debug, Serialize)]
struct ConversionReport {
    conversion_id: String,
    path: Vec<TouchCredit>,
    shapley: Option<ShapleyExplanation>,
    markov: Option<MarkovExplanation>,
}

#[derive(Debug, Serialize)]
struct Report {
    paths: u64,
    conversions: u64,
    shapley_version: String,
    shapley_method: String,
    shapley_grand_coalition_value: f64,
    markov_version: String,
    markov_order: usize,
    markov_conversion_probability: f64,
    channels: Vec<ChannelRow>,
    conversion: Option<ConversionReport>,
}

/// Runs `explain`; prints text or JSON on stdout.
pub fn run(input: &str, conversion: Option<&str>, json: bool, cfg: &Config, pseudo: &Pseudonymizer) -> Result<()> {
    let io = ReplayIo { input: input.to_string(), output: "-".into(), paths: None, rejected: None, progress: !json };
    let store = apportion_serve::state_admin::open_keyed(cfg.data_dir().as_deref(), pseudo)?;
    let mut summary = Summary::default();
    let mut rejected = Rejected::open(None)?;
    let idx = index(&io, cfg, &mut rejected, &mut summary)?;
    let mut stats = cfg.model_plan().empty_stats();
    let mut per_channel: BTreeMap<String, (u64, u64)> = BTreeMap::new();
    apply_pass(&idx, cfg, pseudo, &store, Pass::Fit, io.progress, |e| {
        two_pass::add_closed_path(&mut stats, e);
        if let Effect::Journey { outcome, .. } = e {
            if let Some((converted, path)) = outcome.closed_path() {
                for c in distinct_channels(path) {
                    let entry = per_channel.entry(c.to_string()).or_default();
                    entry.0 += 1;
                    entry.1 += converted as u64;
                }
            }
        }
        Ok(())
    })?;
    let shapley = ShapleyModel::fit(&stats);
    let markov = MarkovModel::fit(&stats);
    let global = shapley.global_values(GLOBAL_SEED);
    let positive: f64 = global.channels.iter().map(|c| c.value.max(0.0)).sum();
    let re = markov.removal_effects();
    let re_sum: f64 = re.iter().map(|(_, r)| r.max(0.0)).sum();
    let re_of: BTreeMap<&str, f64> = re.iter().map(|(c, r)| (c.as_str(), *r)).collect();
    let channels: Vec<ChannelRow> = global
        .channels
        .iter()
        .map(|g| {
            let (paths, conv) = per_channel.get(&g.channel).copied().unwrap_or_default();
            let r = re_of.get(g.channel.as_str()).copied().unwrap_or(0.0);
            ChannelRow {
                channel: g.channel.clone(),
                paths,
                converting_paths: conv,
                shapley_value: g.value,
                shapley_std_error: g.std_error,
                shapley_share: if positive > 0.0 { g.value.max(0.0) / positive } else { 0.0 },
                removal_effect: r,
                markov_share: if re_sum > 0.0 { r.max(0.0) / re_sum } else { 0.0 },
            }
        })
        .collect();

    let conversion_report = match conversion {
        None => None,
        Some(id) => {
            let mut found: Option<(Vec<Touch>, i64)> = None;
            apply_pass(&idx, cfg, pseudo, &store, Pass::Credit, false, |e| {
                if let Effect::Journey { outcome: Outcome::Converted { conversion, path }, .. } = e {
                    if conversion.event_id == id {
                        found = Some((path.clone(), conversion.ts));
                    }
                }
                Ok(())
            })?;
            let Some((path, conv_ts)) = found else {
                bail!("conversion {id:?} was not found among the valid conversions of {input}");
            };
            let models = cfg.model_plan().build(Some(&stats));
            let mut rows: Vec<TouchCredit> = path
                .iter()
                .enumerate()
                .map(|(i, t)| TouchCredit {
                    position: i + 1,
                    touch_event_id: t.event_id.clone(),
                    channel: t.channel.clone(),
                    credit: BTreeMap::new(),
                })
                .collect();
            if !path.is_empty() {
                for m in &models {
                    for (row, w) in rows.iter_mut().zip(m.credit(&path, conv_ts)) {
                        row.credit.insert(m.id().to_string(), w);
                    }
                }
            }
            let distinct = distinct_channels(&path);
            Some(ConversionReport {
                conversion_id: id.to_string(),
                path: rows,
                shapley: (!path.is_empty()).then(|| shapley.explain_conversion(&distinct)),
                markov: (!path.is_empty()).then(|| markov.explain_conversion(&distinct)),
            })
        }
    };

    let report = Report {
        paths: stats.paths(),
        conversions: stats.conversions(),
        shapley_version: shapley.model_version().to_string(),
        shapley_method: format!("{:?}", global.method).to_lowercase(),
        shapley_grand_coalition_value: global.grand_coalition_value,
        markov_version: markov.model_version().to_string(),
        markov_order: markov.order(),
        markov_conversion_probability: markov.conversion_probability(),
        channels,
        conversion: conversion_report,
    };
    if json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_text(&report);
    }
    Ok(())
}

fn print_text(r: &Report) {
    println!("Fitted on {} closed paths ({} converting).", r.paths, r.conversions);
    println!(
        "shapley {} ({}; values sum to v(all channels) = {:.6})",
        r.shapley_version, r.shapley_method, r.shapley_grand_coalition_value
    );
    println!(
        "markov  {} (order {}; P(conversion) = {:.6})",
        r.markov_version, r.markov_order, r.markov_conversion_probability
    );
    println!(
        "\n{:<18}{:>8}{:>11}{:>14}{:>9}{:>12}{:>9}",
        "channel", "paths", "converting", "shapley value", "share", "removal eff", "share"
    );
    for c in &r.channels {
        println!(
            "{:<18}{:>8}{:>11}{:>14.6}{:>9.4}{:>12.6}{:>9.4}",
            c.channel, c.paths, c.converting_paths, c.shapley_value, c.shapley_share, c.removal_effect, c.markov_share
        );
    }
    println!("\nshapley share: positive global values normalized; markov share: removal effects normalized.");
    let Some(conv) = &r.conversion else { return };
    println!("\nConversion {}:", conv.conversion_id);
    if conv.path.is_empty() {
        println!("  no eligible touch: one unattributed row, credit 1 under every model");
        return;
    }
    let models: Vec<&String> = conv.path[0].credit.keys().collect();
    print!("  {:<4}{:<16}", "pos", "channel");
    for m in &models {
        print!("{:>12}", m);
    }
    println!();
    for t in &conv.path {
        print!("  {:<4}{:<16}", t.position, t.channel);
        for m in &models {
            print!("{:>12.4}", t.credit[*m]);
        }
        println!();
    }
    if let Some(s) = &conv.shapley {
        println!("\n  shapley terms (v(S) = conv / (conv + non) of paths whose channel set is exactly S):");
        for c in &s.coalitions {
            println!(
                "    v({{{}}}) = {:.6}   ({} converting, {} not)",
                c.channels.join(", "),
                c.value,
                c.conversions,
                c.non_conversions
            );
        }
        for c in &s.channels {
            println!("    phi({}) = {:.6} -> clamped {:.6} -> share {:.6}", c.channel, c.phi, c.phi_clamped, c.share);
        }
        if s.fallback_linear {
            println!("    no positive value: linear over the distinct channels");
        }
    }
    if let Some(m) = &conv.markov {
        println!("\n  markov terms (P = {:.6}):", m.conversion_probability);
        for c in &m.channels {
            println!(
                "    {}: P without = {:.6}, removal effect = {:.6}, share = {:.6}",
                c.channel, c.conversion_probability_without, c.removal_effect, c.share
            );
        }
        if m.fallback_linear {
            println!("    removal effects sum to 0: linear over the distinct channels");
        }
    }
}
