//! Scoring attribution models against the simulator's ground truth.
//!
//! A run simulates users, credits every conversion under every model, adds
//! up each model's credit per channel into shares, and compares the shares
//! with the true effects ([`crate::simulate`]): Spearman's rank correlation
//! across channels, and the share of credit given to channels that do
//! nothing. The models run with their default parameters: nothing here is
//! tuned to the simulator.
//!
//! Two ways to credit: through the real `apportion replay` binary
//! ([`credit_with_binary`], what the command line uses: it exercises the
//! parser, sort, store and writer too) or in process through the engine's
//! [`replay_lines`] ([`credit_in_process`], for tests and cross-checks).

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::Path;
use std::process::Command;

use apportion_engine::contract::UNATTRIBUTED;
use apportion_engine::replay::replay_lines;
use apportion_engine::{ModelId, ModelPlan, Pseudonymizer, Rules};
use serde::{Deserialize, Serialize};

use crate::simulate::Truth;
use crate::stats::{mean_sd, spearman};
use crate::LoadError;

/// Every model of the contract, in its order.
pub const ALL_MODELS: [&str; 7] =
    ["last_touch", "first_touch", "linear", "time_decay", "u_shaped", "shapley", "markov"];

/// Key given to the pseudonymizer (credit does not depend on it).
pub const LOAD_PSEUDONYM_KEY: &str = "apportion-load-simulation-key";

/// Credit per model and channel.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct CreditTotals {
    /// model -> channel -> summed credit.
    pub credit: BTreeMap<String, BTreeMap<String, f64>>,
    /// model -> conversions credited (including unattributed ones).
    pub conversions: BTreeMap<String, u64>,
}

impl CreditTotals {
    /// Adds one credit row.
    pub fn add(&mut self, model: &str, channel: &str, credit: f64, position: u32) {
        *self.credit.entry(model.to_string()).or_default().entry(channel.to_string()).or_default() += credit;
        if position <= 1 {
            *self.conversions.entry(model.to_string()).or_default() += 1;
        }
    }

    /// Reads credit rows (NDJSON, the output contract) and adds them up.
    pub fn from_ndjson<R: BufRead>(r: R) -> Result<Self, LoadError> {
        #[derive(Deserialize)]
        struct Row<'a> {
            #[serde(borrow)]
            model: std::borrow::Cow<'a, str>,
            #[serde(borrow)]
            channel: std::borrow::Cow<'a, str>,
            credit: f64,
            position: u32,
        }
        let mut t = CreditTotals::default();
        for line in r.lines() {
            let line = line?;
            if line.trim().is_empty() {
                continue;
            }
            let row: Row = serde_json::from_str(&line)?;
            t.add(&row.model, &row.channel, row.credit, row.position);
        }
        Ok(t)
    }

    /// Largest absolute difference of any model/channel total.
    pub fn max_abs_diff(&self, other: &CreditTotals) -> f64 {
        let mut worst: f64 = 0.0;
        for (a, b) in [(self, other), (other, self)] {
            for (m, chans) in &a.credit {
                for (c, v) in chans {
                    let w = b.credit.get(m).and_then(|x| x.get(c)).copied().unwrap_or(f64::INFINITY);
                    worst = worst.max((v - w).abs());
                }
            }
        }
        worst
    }
}

/// Credits NDJSON lines in process with the engine's replay loop (default
/// journey rules; two passes when a data-driven model is listed).
pub fn credit_in_process(lines: &[&str], models: &[&str]) -> CreditTotals {
    let ids = models.iter().map(|m| ModelId::parse(m).unwrap_or_else(|e| panic!("{e}"))).collect();
    let plan = ModelPlan { ids, ..ModelPlan::rules() };
    let pseudo = Pseudonymizer::new(LOAD_PSEUDONYM_KEY.as_bytes());
    let r = replay_lines(lines, Rules::default(), &pseudo, &plan);
    let mut t = CreditTotals::default();
    for row in &r.rows {
        t.add(row.model.as_str(), &row.channel, row.credit, row.position);
    }
    t
}

/// Credits an events file with `apportion replay` (`bin`), writing the
/// credit rows into `workdir`, and adds them up.
pub fn credit_with_binary(
    bin: &Path,
    events: &Path,
    workdir: &Path,
    models: &[&str],
) -> Result<CreditTotals, LoadError> {
    let credit = workdir.join("credit.ndjson");
    let out = Command::new(bin)
        .arg("replay")
        .arg("--input")
        .arg(events)
        .arg("--output")
        .arg(&credit)
        .arg("--models")
        .arg(models.join(","))
        .arg("--quiet")
        .env("APPORTION_PSEUDONYM_KEY", LOAD_PSEUDONYM_KEY)
        .output()
        .map_err(|e| LoadError::Replay(format!("cannot run {}: {e}", bin.display())))?;
    if !out.status.success() {
        return Err(LoadError::Replay(format!(
            "{} replay exited with {}: {}",
            bin.display(),
            out.status,
            String::from_utf8_lossy(&out.stderr).trim()
        )));
    }
    let t = CreditTotals::from_ndjson(BufReader::with_capacity(1 << 20, std::fs::File::open(&credit)?))?;
    std::fs::remove_file(&credit)?;
    Ok(t)
}

/// How one model did against the truth.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelScore {
    /// Model name.
    pub model: String,
    /// Spearman's rho between the model's channel shares and the true
    /// incremental conversions (None when either side is constant).
    pub spearman: Option<f64>,
    /// Share of credit given to channels with no effect, shown in the mix.
    pub untargeted_null_share: f64,
    /// Share given to channels with no effect, shown by intent targeting.
    pub targeted_null_share: f64,
    /// Share per channel in scenario order (`unattributed` excluded).
    pub shares: Vec<f64>,
    /// Conversions the model credited.
    pub conversions: u64,
}

impl ModelScore {
    /// All credit given to channels that do nothing.
    pub fn null_share(&self) -> f64 {
        self.untargeted_null_share + self.targeted_null_share
    }
}

/// Scores every model of `totals` in `models` order against `truth`.
pub fn score(truth: &Truth, totals: &CreditTotals, models: &[&str]) -> Vec<ModelScore> {
    let effects: Vec<f64> = truth.channels.iter().map(|c| c.incremental_conversions).collect();
    models
        .iter()
        .map(|&m| {
            let by_channel = totals.credit.get(m).cloned().unwrap_or_default();
            let total: f64 = by_channel.iter().filter(|(c, _)| c.as_str() != UNATTRIBUTED).map(|(_, v)| *v).sum();
            let shares: Vec<f64> = truth
                .channels
                .iter()
                .map(|c| {
                    let v = by_channel.get(&c.channel).copied().unwrap_or(0.0);
                    if total > 0.0 {
                        v / total
                    } else {
                        0.0
                    }
                })
                .collect();
            let sum_where = |f: &dyn Fn(&crate::simulate::ChannelTruth) -> bool| -> f64 {
                truth.channels.iter().zip(&shares).filter(|(c, _)| f(c)).map(|(_, s)| *s).sum()
            };
            ModelScore {
                model: m.to_string(),
                spearman: spearman(&shares, &effects),
                untargeted_null_share: sum_where(&|c| c.does_nothing && !c.targeted),
                targeted_null_share: sum_where(&|c| c.does_nothing && c.targeted),
                shares,
                conversions: totals.conversions.get(m).copied().unwrap_or(0),
            }
        })
        .collect()
}

/// One simulation and its scores.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Run {
    /// The ground truth.
    pub truth: Truth,
    /// One score per model.
    pub scores: Vec<ModelScore>,
    /// Largest credit difference between binary and in-process crediting,
    /// when both were run.
    pub cross_check_max_abs_diff: Option<f64>,
}

/// Runs of several seeds with the same scenario and size.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Report {
    /// The runs, in seed order.
    pub runs: Vec<Run>,
    /// How credit was computed (for the table's caption).
    pub method: String,
}

fn fmt_stat(xs: &[f64], digits: usize) -> String {
    let (m, sd) = mean_sd(xs);
    if xs.len() < 2 {
        return format!("{m:.digits$}");
    }
    let lo = xs.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    format!("{m:.digits$} ± {sd:.digits$} ({lo:.digits$}..{hi:.digits$})")
}

impl Report {
    /// The report as Markdown tables.
    pub fn markdown(&self) -> String {
        use std::fmt::Write;
        let mut s = String::new();
        let Some(first) = self.runs.first() else {
            return "no runs\n".into();
        };
        let seeds: Vec<String> = self.runs.iter().map(|r| r.truth.seed.to_string()).collect();
        let names = first.truth.channel_names();
        let n = self.runs.len();
        let multi = if n > 1 { " (mean ± sample sd (min..max) over runs)" } else { "" };
        let _ = writeln!(
            s,
            "Scenario: {}; {} users per run; seeds {}; credit via {}.\n",
            first.truth.scenario.name,
            first.truth.users,
            seeds.join(", "),
            self.method
        );
        let col = |f: &dyn Fn(&Run) -> f64| -> Vec<f64> { self.runs.iter().map(f).collect() };
        let _ = writeln!(s, "Per run: events, conversions, conversions whose path has only do-nothing channels (their credit must go to those), expected conversions, expected without any channel effect{multi}:\n");
        let _ = writeln!(s, "| events | conversions | of which no effective channel on the path | expected conversions | expected without marketing |");
        let _ = writeln!(s, "| --- | --- | --- | --- | --- |");
        let _ = writeln!(
            s,
            "| {} | {} | {} ({} of conversions) | {} | {} |\n",
            fmt_stat(&col(&|r| r.truth.events as f64), 0),
            fmt_stat(&col(&|r| r.truth.conversions as f64), 0),
            fmt_stat(&col(&|r| r.truth.conversions_without_effective_channel as f64), 0),
            fmt_stat(
                &col(&|r| r.truth.conversions_without_effective_channel as f64 / r.truth.conversions.max(1) as f64),
                3
            ),
            fmt_stat(&col(&|r| r.truth.expected_conversions), 1),
            fmt_stat(&col(&|r| r.truth.expected_conversions_without_marketing), 1),
        );

        let _ = writeln!(s, "Ground truth per channel{multi}:\n");
        let _ = writeln!(
            s,
            "| channel | logit effect | exposure | exposed users | true incremental conversions | true share | conv. rate exposed | conv. rate not exposed |"
        );
        let _ = writeln!(s, "| --- | --- | --- | --- | --- | --- | --- | --- |");
        for (i, name) in names.iter().enumerate() {
            let c0 = &first.truth.channels[i];
            let exposure = if c0.targeted { "targeted (high intent)" } else { "mix" };
            let _ = writeln!(
                s,
                "| {name} | {:.2} | {exposure} | {} | {} | {} | {} | {} |",
                c0.logit_effect,
                fmt_stat(&col(&|r| r.truth.channels[i].exposed_users as f64), 0),
                fmt_stat(&col(&|r| r.truth.channels[i].incremental_conversions), 1),
                fmt_stat(&col(&|r| r.truth.channels[i].incremental_share), 3),
                fmt_stat(&col(&|r| r.truth.channels[i].conversion_rate_exposed), 4),
                fmt_stat(&col(&|r| r.truth.channels[i].conversion_rate_unexposed), 4),
            );
        }

        let null_names: Vec<&str> =
            first.truth.channels.iter().filter(|c| c.does_nothing && !c.targeted).map(|c| c.channel.as_str()).collect();
        let targeted: Vec<&str> =
            first.truth.channels.iter().filter(|c| c.does_nothing && c.targeted).map(|c| c.channel.as_str()).collect();
        let _ = writeln!(s, "\nScores per model{multi}:\n");
        let _ = writeln!(
            s,
            "| model | Spearman rho (shares vs true incremental conversions) | share to do-nothing channels ({}) | share to targeted do-nothing ({}) | all do-nothing |",
            null_names.join(", "),
            targeted.join(", ")
        );
        let _ = writeln!(s, "| --- | --- | --- | --- | --- |");
        for (k, score) in first.scores.iter().enumerate() {
            let rho: Vec<f64> = self.runs.iter().filter_map(|r| r.scores[k].spearman).collect();
            let rho_text =
                if rho.len() == n { fmt_stat(&rho, 3) } else { format!("undefined in {} runs", n - rho.len()) };
            let _ = writeln!(
                s,
                "| {} | {rho_text} | {} | {} | {} |",
                score.model,
                fmt_stat(&col(&|r| r.scores[k].untargeted_null_share), 3),
                fmt_stat(&col(&|r| r.scores[k].targeted_null_share), 3),
                fmt_stat(&col(&|r| r.scores[k].null_share()), 3),
            );
        }

        let _ = writeln!(s, "\nShare of credit per channel (mean over runs):\n");
        let _ = writeln!(s, "| model | {} |", names.join(" | "));
        let _ = writeln!(s, "| --- |{}", " --- |".repeat(names.len()));
        let _ = writeln!(
            s,
            "| *truth (incremental share)* | {} |",
            (0..names.len())
                .map(|i| format!("{:.3}", mean_sd(&col(&|r| r.truth.channels[i].incremental_share)).0))
                .collect::<Vec<_>>()
                .join(" | ")
        );
        for (k, score) in first.scores.iter().enumerate() {
            let _ = writeln!(
                s,
                "| {} | {} |",
                score.model,
                (0..names.len())
                    .map(|i| format!("{:.3}", mean_sd(&col(&|r| r.scores[k].shares[i])).0))
                    .collect::<Vec<_>>()
                    .join(" | ")
            );
        }
        let checks: Vec<f64> = self.runs.iter().filter_map(|r| r.cross_check_max_abs_diff).collect();
        if !checks.is_empty() {
            let worst = checks.iter().copied().fold(0.0, f64::max);
            let _ = writeln!(
                s,
                "\nCross-check: binary and in-process engine credit agree within {worst:.3e} (largest per-model, per-channel total difference, {} runs).",
                checks.len()
            );
        }
        s
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scenario::Scenario;
    use crate::simulate::{simulate, SimOptions};

    fn small_run(users: u64, seed: u64) -> (Truth, CreditTotals, Vec<ModelScore>) {
        let mut buf = Vec::new();
        let truth = simulate(&Scenario::example_shop(), &SimOptions::new(users, seed), &mut buf).unwrap();
        let text = String::from_utf8(buf).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        let totals = credit_in_process(&lines, &ALL_MODELS);
        let scores = score(&truth, &totals, &ALL_MODELS);
        (truth, totals, scores)
    }

    #[test]
    fn small_groundtruth_run_in_process() {
        let (truth, _totals, scores) = small_run(3000, 17);
        assert_eq!(scores.len(), ALL_MODELS.len(), "one row per model");
        for (s, name) in scores.iter().zip(ALL_MODELS) {
            assert_eq!(s.model, name);
            let sum: f64 = s.shares.iter().sum();
            assert!((sum - 1.0).abs() < 1e-9, "{name}: shares sum to {sum}");
            assert!(s.shares.iter().all(|&x| x >= 0.0));
            // Every simulated user has a touch inside the lookback, so each
            // conversion is credited once per model and none is unattributed.
            assert_eq!(s.conversions, truth.conversions, "{name}");
            let rho = s.spearman.expect("shares vary across channels");
            assert!((-1.0..=1.0).contains(&rho));
            assert!((s.null_share() - (s.untargeted_null_share + s.targeted_null_share)).abs() < 1e-15);
            // A conversion with only do-nothing channels on its path gives
            // them all of its credit, under any model whose fractions sum to 1.
            let floor = truth.conversions_without_effective_channel as f64 / truth.conversions as f64;
            assert!(s.null_share() >= floor - 1e-9, "{name}: {} < {floor}", s.null_share());
        }
        let report =
            Report { runs: vec![Run { truth, scores, cross_check_max_abs_diff: None }], method: "test".into() };
        let md = report.markdown();
        for name in ALL_MODELS {
            assert_eq!(md.matches(&format!("\n| {name} |")).count(), 2, "{name} in both model tables:\n{md}");
        }
    }

    #[test]
    fn linear_credit_equals_touch_counts_of_converting_journeys() {
        // Independent of the engine: under `linear` each converting journey
        // gives 1/n to each of its n touches, so the channel totals can be
        // recomputed from the events themselves.
        let mut buf = Vec::new();
        simulate(&Scenario::example_shop(), &SimOptions::new(1500, 4), &mut buf).unwrap();
        let text = String::from_utf8(buf).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        let mut per_user: BTreeMap<String, (Vec<String>, bool)> = BTreeMap::new();
        for l in &lines {
            let v: serde_json::Value = serde_json::from_str(l).unwrap();
            let e = per_user.entry(v["user_id"].as_str().unwrap().to_string()).or_default();
            match v["type"].as_str().unwrap() {
                "touch" => e.0.push(v["channel"].as_str().unwrap().to_string()),
                _ => e.1 = true,
            }
        }
        let mut expect: BTreeMap<String, f64> = BTreeMap::new();
        for (chans, converted) in per_user.values() {
            if *converted {
                for c in chans {
                    *expect.entry(c.clone()).or_default() += 1.0 / chans.len() as f64;
                }
            }
        }
        let totals = credit_in_process(&lines, &["linear"]);
        let got = &totals.credit["linear"];
        assert_eq!(got.keys().collect::<Vec<_>>(), expect.keys().collect::<Vec<_>>());
        for (c, v) in &expect {
            assert!((got[c] - v).abs() < 1e-9, "{c}: {} vs {v}", got[c]);
        }
    }

    #[test]
    fn totals_from_credit_rows() {
        let rows = r#"{"model":"linear","channel":"email","credit":0.5,"position":1}
{"model":"linear","channel":"social","credit":0.5,"position":2}
{"model":"linear","channel":"unattributed","credit":1.0,"position":0}
"#;
        let t = CreditTotals::from_ndjson(rows.as_bytes()).unwrap();
        assert_eq!(t.conversions["linear"], 2);
        assert_eq!(t.credit["linear"]["email"], 0.5);
        assert_eq!(t.max_abs_diff(&t), 0.0);
        let mut u = t.clone();
        u.add("linear", "email", 0.25, 3);
        assert_eq!(t.max_abs_diff(&u), 0.25);
    }
}
