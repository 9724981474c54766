//! `markov`: removal effects in an absorbing Markov chain fitted from closed
//! paths (Archak et al. 2010; Anderl et al. 2016; absorbing chains as in
//! Kemeny and Snell 1960). Definition in docs/contract.md, "Models".
//!
//! ## The chain
//! Transient states START and one per state tuple of the statistics (for
//! order k, the last up to k channels; see [`super::stats`]), absorbing
//! states CONVERSION and NULL; transition probabilities are the
//! row-normalized counts. `P` is the probability of absorption in
//! CONVERSION from START.
//!
//! ## Removal rule
//! Removing channel c redirects every transition into a state whose **last**
//! channel is c to NULL (for order 1: every transition into c). For higher
//! orders this is the same as redirecting transitions into every state that
//! *contains* c: a state holding c anywhere was only ever entered right
//! after a state ending in c (START enters one-channel states, and each
//! step appends one channel), so once those are cut off the others are
//! unreachable and cannot change `P_-c`. The worked example of Anderl et
//! al.'s kind in tests/datadriven.rs (second order: shares 1/3, 1/6, 1/2)
//! pins this down. `RE(c) = 1 - P_-c / P`, and every RE is 0 when `P = 0`.
//!
//! **Clamping.** Redirecting transitions to NULL can only lower the
//! absorption probability (every path to CONVERSION in the reduced chain
//! exists with the same probability in the full one), so `0 <= P_-c <= P`
//! and `0 <= RE(c) <= 1` in exact arithmetic. In floating point `P_-c` can
//! come out a rounding error off (e.g. -1e-17 for a channel on every
//! converting path): RE is clamped to `[0, 1]` for that reason only.
//!
//! ## Solving
//! Directly, never by a fixed number of power iterations: see
//! the private `linalg` module (dense LU with the fundamental-matrix shortcut
//! for the removals up to [`DENSE_MAX`] transient states, sparse
//! Gauss-Seidel to a proven error bound above it).
//!
//! ## Credit
//! A conversion with distinct channels C gives c the share
//! `RE(c) / sum_{c' in C} RE(c')`, linear over C when that sum is 0
//! (including channels the snapshot never saw, whose RE is 0), split
//! evenly over c's touches.

use std::collections::HashMap;

use serde::{Deserialize, Serialize};

use super::linalg::{absorb, Chain};
pub use super::linalg::{SolveMethod, DENSE_MAX};
use super::shapley::{bucket, credit_bucketed, dedup_keep_first};
use super::stats::{PathStats, CONV, NULL, START};
use crate::journey::Touch;
use apportion_contract::ModelId;

use crate::model::Model;

/// The fitted `markov` model.
#[derive(Debug, Clone)]
pub struct MarkovModel {
    version: String,
    order: usize,
    p: f64,
    /// (channel, P_-c, RE(c)), sorted by channel.
    effects: Vec<(String, f64, f64)>,
    index: HashMap<String, usize>,
    report: SolveReport,
    /// With the channel cap reached: the largest kept channel.
    overflow_above: Option<String>,
}

/// How the chain was solved, for diagnostics.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SolveReport {
    /// Solver used.
    pub method: SolveMethod,
    /// Transient states (START included).
    pub transient_states: usize,
    /// Residual of the dense solve, or the iterative solver's error bound.
    pub error_bound: f64,
}

/// One channel of a conversion's Markov explanation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MarkovChannel {
    /// Channel name.
    pub channel: String,
    /// Whether the snapshot has seen the channel (unseen: RE = 0).
    pub seen: bool,
    /// `P_-c`: conversion probability with the channel removed.
    pub conversion_probability_without: f64,
    /// `RE(c) = 1 - P_-c / P`.
    pub removal_effect: f64,
    /// Share of the conversion.
    pub share: f64,
}

/// Why a conversion got the shares it got under `markov`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct MarkovExplanation {
    /// Snapshot id of the model.
    pub model_version: String,
    /// Markov order of the chain.
    pub order: usize,
    /// `P`: conversion probability from START.
    pub conversion_probability: f64,
    /// True when the removal effects of the channels summed to 0 and every
    /// channel got 1/|C|.
    pub fallback_linear: bool,
    /// One entry per distinct channel, in the order given.
    pub channels: Vec<MarkovChannel>,
    /// How the chain was solved.
    pub solver: SolveReport,
}

impl MarkovModel {
    /// Fits the chain and every channel's removal effect.
    pub fn fit(stats: &PathStats) -> Self {
        let names = stats.raw_channels();
        let states = stats.raw_states();
        // Canonical numbering (by channel names) so that equal statistics
        // give bit-identical results whatever order they were built in.
        let mut by_name: Vec<usize> = (0..states.len()).collect();
        let key = |s: usize| states[s].iter().map(|&i| names[i as usize].as_str()).collect::<Vec<&str>>();
        by_name.sort_by_cached_key(|&s| key(s));
        let mut idx = vec![0usize; states.len()];
        for (k, &s) in by_name.iter().enumerate() {
            idx[s] = k + 1; // 0 is START
        }
        let n = states.len() + 1;
        let node = |x: u32| if x == START { 0 } else { idx[x as usize] };

        let mut out_total = vec![0u64; n];
        let mut counts: Vec<Vec<(usize, u64)>> = vec![Vec::new(); n];
        let mut conv = vec![0u64; n];
        for (&(a, b), &c) in stats.raw_transitions() {
            let from = node(a);
            out_total[from] += c;
            match b {
                CONV => conv[from] += c,
                NULL => {}
                s => counts[from].push((node(s), c)),
            }
        }
        let rows: Vec<Vec<(usize, f64)>> = counts
            .into_iter()
            .enumerate()
            .map(|(s, mut row)| {
                row.sort_unstable();
                row.into_iter().map(|(t, c)| (t, c as f64 / out_total[s] as f64)).collect()
            })
            .collect();
        let r: Vec<f64> =
            (0..n).map(|s| if out_total[s] == 0 { 0.0 } else { conv[s] as f64 / out_total[s] as f64 }).collect();
        let chain = Chain { rows, r };

        let mut channels: Vec<String> = names.to_vec();
        channels.sort_unstable();
        let index: HashMap<String, usize> = channels.iter().enumerate().map(|(i, c)| (c.clone(), i)).collect();
        let mut removals: Vec<Vec<usize>> = vec![Vec::new(); channels.len()];
        for (s, tuple) in states.iter().enumerate() {
            if let Some(&last) = tuple.last() {
                removals[index[&names[last as usize]]].push(idx[s]);
            }
        }
        for set in &mut removals {
            set.sort_unstable();
        }
        let a = absorb(&chain, &removals);
        let p = a.p.clamp(0.0, 1.0);
        let effects = channels
            .iter()
            .zip(&a.without)
            .map(|(c, &w)| {
                let w = w.clamp(0.0, p);
                let re = if p > 0.0 { (1.0 - w / p).clamp(0.0, 1.0) } else { 0.0 };
                (c.clone(), w, re)
            })
            .collect();
        let fp = stats.fingerprint();
        MarkovModel {
            version: format!("markov-o{}-{}", stats.markov_order(), &fp[..16]),
            order: stats.markov_order(),
            p,
            effects,
            index,
            report: SolveReport { method: a.method, transient_states: n, error_bound: a.error_bound },
            overflow_above: stats.overflow_above().map(str::to_string),
        }
    }

    /// The channel a touch of `channel` is counted under: itself, or
    /// [`super::OVERFLOW_CHANNEL`] when the statistics' cap sends it to
    /// the bucket (docs/contract.md, "Models", Channel cap).
    pub fn bucket<'a>(&self, channel: &'a str) -> &'a str {
        bucket(self.index.contains_key(channel), self.overflow_above.as_deref(), channel)
    }

    /// Snapshot id, `markov-o<order>-<first 16 hex digits of the stats fingerprint>`.
    pub fn model_version(&self) -> &str {
        &self.version
    }

    /// Markov order of the chain.
    pub fn order(&self) -> usize {
        self.order
    }

    /// `P`: probability of absorption in CONVERSION from START.
    pub fn conversion_probability(&self) -> f64 {
        self.p
    }

    /// `P_-c` for a channel (`P` for a channel never seen).
    pub fn conversion_probability_without(&self, channel: &str) -> f64 {
        self.index.get(channel).map_or(self.p, |&i| self.effects[i].1)
    }

    /// `RE(c)` for every channel seen, sorted by channel.
    pub fn removal_effects(&self) -> Vec<(String, f64)> {
        self.effects.iter().map(|(c, _, re)| (c.clone(), *re)).collect()
    }

    /// `RE(c)` for one channel (0 when never seen).
    pub fn removal_effect(&self, channel: &str) -> f64 {
        self.index.get(channel).map_or(0.0, |&i| self.effects[i].2)
    }

    /// How the chain was solved.
    pub fn solve_report(&self) -> SolveReport {
        self.report
    }

    fn shares(&self, distinct: &[&str]) -> (Vec<f64>, bool) {
        let re: Vec<f64> = distinct.iter().map(|c| self.removal_effect(c)).collect();
        super::shapley::clamp_normalize(&re)
    }

    /// Explains the credit of a conversion whose path has these distinct
    /// channels (duplicates are dropped, first occurrence kept).
    pub fn explain_conversion(&self, channels_distinct: &[&str]) -> MarkovExplanation {
        let mapped: Vec<&str> = channels_distinct.iter().map(|c| self.bucket(c)).collect();
        let distinct = dedup_keep_first(&mapped);
        let (shares, fallback_linear) = self.shares(&distinct);
        let channels = distinct
            .iter()
            .zip(&shares)
            .map(|(c, &share)| MarkovChannel {
                channel: c.to_string(),
                seen: self.index.contains_key(*c),
                conversion_probability_without: self.conversion_probability_without(c),
                removal_effect: self.removal_effect(c),
                share,
            })
            .collect();
        MarkovExplanation {
            model_version: self.version.clone(),
            order: self.order,
            conversion_probability: self.p,
            fallback_linear,
            channels,
            solver: self.report,
        }
    }
}

impl Model for MarkovModel {
    fn id(&self) -> ModelId {
        ModelId::Markov
    }
    fn version(&self) -> Option<&str> {
        Some(&self.version)
    }
    fn credit(&self, path: &[Touch], _conversion_ts: i64) -> Vec<f64> {
        credit_bucketed(path, |c| self.bucket(c), |distinct| self.shares(distinct).0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The "contains c" removal rule gives the same P_-c as the "last is c"
    /// rule (module docs), here on random second- and third-order chains.
    #[test]
    fn last_channel_rule_equals_contains_rule() {
        use rand::{Rng, SeedableRng};
        for order in 2..=3 {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(order as u64);
            let mut stats = PathStats::new(order);
            let names = ["a", "b", "c", "d"];
            for _ in 0..400 {
                let len = rng.gen_range(1..6);
                let p: Vec<&str> = (0..len).map(|_| names[rng.gen_range(0..4)]).collect();
                stats.add_path(&p, rng.gen_bool(0.4));
            }
            let model = MarkovModel::fit(&stats);
            // Rebuild the chain with the other rule through the same solver.
            let chan = stats.raw_channels();
            let states = stats.raw_states();
            let n = states.len() + 1;
            let node = |x: u32| if x == START { 0 } else { x as usize + 1 };
            let mut tot = vec![0u64; n];
            let mut rows: Vec<Vec<(usize, f64)>> = vec![Vec::new(); n];
            let mut r = vec![0.0; n];
            for (&(a, _), &c) in stats.raw_transitions() {
                tot[node(a)] += c;
            }
            for (&(a, b), &c) in stats.raw_transitions() {
                let p = c as f64 / tot[node(a)] as f64;
                match b {
                    CONV => r[node(a)] += p,
                    NULL => {}
                    s => rows[node(a)].push((node(s), p)),
                }
            }
            let chain = Chain { rows, r };
            let removals: Vec<Vec<usize>> = (0..chan.len() as u32)
                .map(|c| states.iter().enumerate().filter(|(_, t)| t.contains(&c)).map(|(s, _)| s + 1).collect())
                .collect();
            let a = absorb(&chain, &removals);
            for (c, w) in chan.iter().zip(&a.without) {
                assert!((model.conversion_probability_without(c) - w.max(0.0)).abs() < 1e-12);
            }
        }
    }
}
