//! `shapley`: Shapley values of the conversion-rate game (Shapley 1953; for
//! attribution, Dalessandro et al. 2012). Definition in docs/contract.md, "Models".
//!
//! ## The game
//! `v(S) = conv(S) / (conv(S) + non(S))` for a channel set S seen as the
//! exact set of distinct channels of some closed path; `v(S) = 0` for a set
//! never seen and `v({}) = 0`. A conversion whose path has the distinct
//! channel set C is credited with the Shapley values of the game restricted
//! to C, negative values set to 0 and the rest normalized (linear over C
//! when nothing is positive), each channel's share split evenly over its
//! touches.
//!
//! ## Computing it
//! Writing `w(s) = s! (n-s-1)! / n!` for n players, the definition
//! `phi(i) = sum_{S subset N\{i}} w(|S|) (v(S+i) - v(S))` regroups by
//! coalition T into
//! `phi(i) = sum_{T contains i} w(|T|-1) v(T) - sum_{T not containing i} w(|T|) v(T)`,
//! one pass over the coalitions instead of one per player. Two exact ways to
//! run that pass:
//!
//! - **subsets**: enumerate the 2^n coalitions as bit masks
//!   ([`shapley_values`]); used for a conversion with at most
//!   [`ENUMERATE_MAX`] distinct channels, and for the global game with at
//!   most [`GLOBAL_EXACT_MAX`] channels.
//! - **seen sets**: v is 0 except on the seen sets, so only those terms
//!   matter: with `B = sum_T w(|T|) v(T)` (taking `w(n) = 0`),
//!   `phi(i) = sum_{T contains i} (w(|T|-1) + w(|T|)) v(T) - B`, over the seen
//!   sets T inside C. Cost O(seen sets x set size), independent of 2^n.
//!
//! **Huge paths.** A conversion with more than [`ENUMERATE_MAX`] distinct
//! channels (2^n would be too many coalitions) uses the seen-sets pass:
//! still exact, deterministic and no sampling, at a cost bounded by the
//! size of the statistics. The same pass gives the exact global values for
//! any number of channels ([`ShapleyModel::global_values_exact`]).
//!
//! **Global values.** [`ShapleyModel::global_values`] values every channel
//! seen in the game over all of them: exact by the subset transform up to
//! [`GLOBAL_EXACT_MAX`] channels, else a Monte Carlo estimate over seeded
//! random permutations (ChaCha8) with a standard error per channel. Note
//! that by efficiency these values sum to `v(all channels)`, usually 0 (no
//! path touches every channel): they are marginal values, not shares.

use std::collections::HashMap;

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use super::stats::{PathStats, OVERFLOW_CHANNEL};
use crate::journey::Touch;
use apportion_contract::ModelId;

#[cfg(doc)]
use crate::model::split_by_channel;
use crate::model::Model;

/// Most distinct channels of one conversion computed by subset enumeration.
pub const ENUMERATE_MAX: usize = 16;
/// Most channels for the exact global values by subset transform.
pub const GLOBAL_EXACT_MAX: usize = 20;
/// Most distinct channels whose every coalition is listed in an explanation.
pub const EXPLAIN_ALL_COALITIONS_MAX: usize = 10;
/// Permutations drawn by [`ShapleyModel::global_values`] above
/// [`GLOBAL_EXACT_MAX`] channels.
pub const DEFAULT_PERMUTATIONS: u64 = 20_000;

/// Shapley weights `w(s) = s! (n-s-1)! / n!` for s in `0..n`, with
/// `w(n) = 0` appended (by recurrence, no factorial overflow).
fn weights(n: usize) -> Vec<f64> {
    let mut w = vec![0.0; n + 1];
    if n == 0 {
        return w;
    }
    w[0] = 1.0 / n as f64;
    for s in 0..n - 1 {
        w[s + 1] = w[s] * (s + 1) as f64 / (n - s - 1) as f64;
    }
    w
}

/// Exact Shapley values of any n-player game given by `v` on bit masks
/// (bit i set: player i is in the coalition). Evaluates v on all 2^n
/// coalitions once: O(n 2^n) time, O(n^2) memory.
///
/// # Panics
/// When n > 30 (2^n evaluations would not finish).
pub fn shapley_values(n: usize, v: impl Fn(u64) -> f64) -> Vec<f64> {
    shapley_exact_mut(n, v)
}

/// [`shapley_values`] over a table `v[mask]` of length 2^n.
pub fn shapley_values_table(n: usize, v: &[f64]) -> Vec<f64> {
    assert_eq!(v.len(), 1usize << n, "table must have 2^n entries");
    shapley_exact_mut(n, |m| v[m as usize])
}

fn shapley_exact_mut(n: usize, mut v: impl FnMut(u64) -> f64) -> Vec<f64> {
    assert!(n <= 30, "exact Shapley values for {n} players would need 2^{n} coalitions");
    if n == 0 {
        return Vec::new();
    }
    // inside[i][k]: sum of v(T) over |T| = k containing i; total[k]: over all |T| = k.
    let mut inside = vec![0.0f64; n * (n + 1)];
    let mut total = vec![0.0f64; n + 1];
    for mask in 0..(1u64 << n) {
        let val = v(mask);
        if val == 0.0 {
            continue;
        }
        let k = mask.count_ones() as usize;
        total[k] += val;
        let mut bits = mask;
        while bits != 0 {
            let i = bits.trailing_zeros() as usize;
            inside[i * (n + 1) + k] += val;
            bits &= bits - 1;
        }
    }
    let w = weights(n);
    (0..n)
        .map(|i| {
            let row = &inside[i * (n + 1)..(i + 1) * (n + 1)];
            let mut phi = 0.0;
            for k in 0..=n {
                if k >= 1 {
                    phi += w[k - 1] * row[k];
                }
                phi -= w[k] * (total[k] - row[k]);
            }
            phi
        })
        .collect()
}

/// A Monte Carlo Shapley estimate.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShapleyEstimate {
    /// Estimated value per player.
    pub values: Vec<f64>,
    /// Standard error of each estimate (sample standard deviation of the
    /// marginal contributions over sqrt(permutations)).
    pub std_errors: Vec<f64>,
    /// Permutations drawn.
    pub permutations: u64,
}

fn finish_estimate(sum: Vec<f64>, sumsq: Vec<f64>, permutations: u64) -> ShapleyEstimate {
    let k = permutations.max(1) as f64;
    let values: Vec<f64> = sum.iter().map(|s| s / k).collect();
    let std_errors = sum
        .iter()
        .zip(&sumsq)
        .map(|(s, q)| {
            if permutations < 2 {
                return f64::INFINITY;
            }
            let var = ((q - s * s / k) / (k - 1.0)).max(0.0);
            (var / k).sqrt()
        })
        .collect();
    ShapleyEstimate { values, std_errors, permutations }
}

/// Monte Carlo Shapley values of an n-player game (n <= 64): the average
/// marginal contribution over `permutations` uniformly random orders
/// (Castro, Gomez and Tejada 2009), drawn from ChaCha8 seeded with `seed`.
/// Same seed, same estimate.
pub fn shapley_monte_carlo(n: usize, v: impl Fn(u64) -> f64, permutations: u64, seed: u64) -> ShapleyEstimate {
    assert!(n <= 64, "bit masks hold at most 64 players");
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut perm: Vec<usize> = (0..n).collect();
    let (mut sum, mut sumsq) = (vec![0.0; n], vec![0.0; n]);
    let empty = v(0);
    for _ in 0..permutations {
        perm.shuffle(&mut rng);
        let mut mask = 0u64;
        let mut prev = empty;
        for &i in &perm {
            mask |= 1u64 << i;
            let cur = v(mask);
            let d = cur - prev;
            sum[i] += d;
            sumsq[i] += d * d;
            prev = cur;
        }
    }
    finish_estimate(sum, sumsq, permutations)
}

/// A seen channel set.
#[derive(Debug, Clone)]
struct SeenSet {
    /// Model channel ids, ascending.
    ids: Box<[u32]>,
    conversions: u64,
    non_conversions: u64,
    v: f64,
}

/// How per-channel values were computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ShapleyMethod {
    /// All 2^n coalitions enumerated as bit masks (exact).
    Subsets,
    /// Only the seen channel sets summed (exact; used for large n).
    SeenSets,
    /// Random permutations (estimate with standard errors).
    MonteCarlo,
}

/// One channel of a conversion's Shapley explanation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShapleyChannel {
    /// Channel name.
    pub channel: String,
    /// Shapley value as defined (may be negative).
    pub phi: f64,
    /// `max(phi, 0)`.
    pub phi_clamped: f64,
    /// Share of the conversion (clamped values normalized, or 1/|C|).
    pub share: f64,
}

/// One coalition and its worth.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Coalition {
    /// Channels of the coalition, in the order of the explained channels.
    pub channels: Vec<String>,
    /// Converting paths with exactly this channel set.
    pub conversions: u64,
    /// Non-converting paths with exactly this channel set.
    pub non_conversions: u64,
    /// `v(S)`.
    pub value: f64,
}

/// Why a conversion got the shares it got under `shapley`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShapleyExplanation {
    /// Snapshot id of the model.
    pub model_version: String,
    /// How phi was computed.
    pub method: ShapleyMethod,
    /// True when no channel had a positive value and every channel got 1/|C|.
    pub fallback_linear: bool,
    /// One entry per distinct channel, in the order given.
    pub channels: Vec<ShapleyChannel>,
    /// The worth of every coalition of the channels (in bit-mask order) when
    /// there are at most [`EXPLAIN_ALL_COALITIONS_MAX`] of them; otherwise
    /// only the coalitions seen in the statistics (every other one is worth
    /// 0 by definition), ordered by size then channel order.
    pub coalitions: Vec<Coalition>,
    /// Whether `coalitions` lists every coalition (true) or only seen ones.
    pub coalitions_complete: bool,
}

/// One channel's value in the game over all channels.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GlobalChannelValue {
    /// Channel name.
    pub channel: String,
    /// Shapley value (or its estimate).
    pub value: f64,
    /// Standard error of a Monte Carlo estimate; `None` when exact.
    pub std_error: Option<f64>,
}

/// Shapley values of every channel seen, in the game over all of them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GlobalShapley {
    /// Snapshot id of the model.
    pub model_version: String,
    /// Exact (`subsets`, `seen_sets`) or estimated (`monte_carlo`).
    pub method: ShapleyMethod,
    /// Seed of the permutations (Monte Carlo only).
    pub seed: Option<u64>,
    /// Permutations drawn (Monte Carlo only).
    pub permutations: Option<u64>,
    /// `v(all channels)`: what the values sum to (efficiency).
    pub grand_coalition_value: f64,
    /// Per channel, sorted by name.
    pub channels: Vec<GlobalChannelValue>,
}

/// The fitted `shapley` model: a snapshot of the channel-set statistics.
#[derive(Debug, Clone)]
pub struct ShapleyModel {
    version: String,
    /// Channel names, sorted; the model's channel id is the index.
    channels: Vec<String>,
    channel_ids: HashMap<String, u32>,
    /// Seen sets, sorted by (size, ids).
    sets: Vec<SeenSet>,
    set_index: HashMap<Box<[u32]>, usize>,
    max_set_len: usize,
    /// With the channel cap reached: the largest kept channel (a channel
    /// never seen that sorts after it is credited through the bucket).
    overflow_above: Option<String>,
}

impl ShapleyModel {
    /// Fits the model: computes `v(S)` for every seen channel set.
    pub fn fit(stats: &PathStats) -> Self {
        let mut channels: Vec<String> = stats.raw_channels().to_vec();
        channels.sort_unstable();
        let channel_ids: HashMap<String, u32> =
            channels.iter().enumerate().map(|(i, c)| (c.clone(), i as u32)).collect();
        let remap: Vec<u32> = stats.raw_channels().iter().map(|c| channel_ids[c]).collect();
        let mut sets: Vec<SeenSet> = stats
            .raw_sets()
            .iter()
            .map(|(ids, o)| {
                let mut mine: Vec<u32> = ids.iter().map(|&i| remap[i as usize]).collect();
                mine.sort_unstable();
                SeenSet {
                    ids: mine.into_boxed_slice(),
                    conversions: o.conversions,
                    non_conversions: o.non_conversions,
                    v: o.rate(),
                }
            })
            .collect();
        sets.sort_unstable_by(|a, b| (a.ids.len(), &a.ids).cmp(&(b.ids.len(), &b.ids)));
        let set_index = sets.iter().enumerate().map(|(i, s)| (s.ids.clone(), i)).collect();
        let max_set_len = sets.iter().map(|s| s.ids.len()).max().unwrap_or(0);
        let fp = stats.fingerprint();
        ShapleyModel {
            version: format!("shapley-{}", &fp[..16]),
            channels,
            channel_ids,
            sets,
            set_index,
            max_set_len,
            overflow_above: stats.overflow_above().map(str::to_string),
        }
    }

    /// The channel a touch of `channel` is counted under: itself, or
    /// [`OVERFLOW_CHANNEL`] when the statistics' cap sends it to the bucket
    /// (docs/contract.md, "Models", Channel cap).
    pub fn bucket<'a>(&self, channel: &'a str) -> &'a str {
        bucket(self.channel_ids.contains_key(channel), self.overflow_above.as_deref(), channel)
    }

    /// Snapshot id, `shapley-<first 16 hex digits of the stats fingerprint>`.
    pub fn model_version(&self) -> &str {
        &self.version
    }

    /// Channels seen, sorted.
    pub fn channels(&self) -> &[String] {
        &self.channels
    }

    /// `v(S)` for a channel set (duplicates ignored; 0 when never seen).
    pub fn value(&self, channels: &[&str]) -> f64 {
        let mut ids = Vec::with_capacity(channels.len());
        for c in channels {
            match self.channel_ids.get(*c) {
                Some(&i) => ids.push(i),
                None => return 0.0,
            }
        }
        ids.sort_unstable();
        ids.dedup();
        self.set_index.get(&ids[..]).map_or(0.0, |&i| self.sets[i].v)
    }

    /// Index of the seen set made of these players (`mask` over `players`).
    fn lookup(&self, players: &[Option<u32>], mask: u64, buf: &mut Vec<u32>) -> Option<usize> {
        if mask == 0 || mask.count_ones() as usize > self.max_set_len {
            return None;
        }
        buf.clear();
        let mut bits = mask;
        while bits != 0 {
            let i = bits.trailing_zeros() as usize;
            buf.push(players[i]?);
            bits &= bits - 1;
        }
        buf.sort_unstable();
        self.set_index.get(&buf[..]).copied()
    }

    /// Seen sets made only of these players, as (set index, the players'
    /// indices). Players that are `None` (channels never seen) are in no
    /// seen set.
    fn seen_subsets(&self, players: &[Option<u32>]) -> Vec<(usize, Vec<usize>)> {
        let pos: HashMap<u32, usize> = players.iter().enumerate().filter_map(|(i, p)| p.map(|id| (id, i))).collect();
        let mut out = Vec::new();
        for (k, s) in self.sets.iter().enumerate() {
            if s.ids.len() > pos.len() {
                break; // sorted by size
            }
            let members: Option<Vec<usize>> = s.ids.iter().map(|id| pos.get(id).copied()).collect();
            if let Some(m) = members {
                out.push((k, m));
            }
        }
        out
    }

    /// Raw Shapley values of the game restricted to `players`.
    fn phi(&self, players: &[Option<u32>]) -> (Vec<f64>, ShapleyMethod) {
        let n = players.len();
        if n <= ENUMERATE_MAX {
            let mut buf = Vec::with_capacity(n);
            let phi = shapley_exact_mut(n, |m| self.lookup(players, m, &mut buf).map_or(0.0, |i| self.sets[i].v));
            return (phi, ShapleyMethod::Subsets);
        }
        (
            self.phi_seen_sets(n, self.seen_subsets(players).iter().map(|(k, m)| (self.sets[*k].v, m.as_slice()))),
            ShapleyMethod::SeenSets,
        )
    }

    /// The seen-sets pass (module docs) for n players.
    fn phi_seen_sets<'a>(&self, n: usize, terms: impl Iterator<Item = (f64, &'a [usize])>) -> Vec<f64> {
        let w = weights(n);
        let mut a = vec![0.0; n];
        let mut b = 0.0;
        for (v, members) in terms {
            if v == 0.0 {
                continue;
            }
            let t = members.len();
            b += w[t] * v;
            let both = (w[t - 1] + w[t]) * v;
            for &i in members {
                a[i] += both;
            }
        }
        a.into_iter().map(|x| x - b).collect()
    }

    fn players(&self, channels_distinct: &[&str]) -> Vec<Option<u32>> {
        channels_distinct.iter().map(|c| self.channel_ids.get(*c).copied()).collect()
    }

    /// Shares of the distinct channels (in the given order), summing to 1.
    fn shares(&self, channels_distinct: &[&str]) -> (Vec<f64>, Vec<f64>, ShapleyMethod, bool) {
        let (phi, method) = self.phi(&self.players(channels_distinct));
        let (shares, fallback) = clamp_normalize(&phi);
        (phi, shares, method, fallback)
    }

    /// Explains the credit of a conversion whose path has these distinct
    /// channels (duplicates are dropped, first occurrence kept; channels in
    /// the overflow bucket are explained as the bucket, once).
    pub fn explain_conversion(&self, channels_distinct: &[&str]) -> ShapleyExplanation {
        let mapped: Vec<&str> = channels_distinct.iter().map(|c| self.bucket(c)).collect();
        let distinct = dedup_keep_first(&mapped);
        let (phi, shares, method, fallback_linear) = self.shares(&distinct);
        let channels = distinct
            .iter()
            .zip(phi.iter().zip(&shares))
            .map(|(c, (&p, &s))| ShapleyChannel { channel: c.to_string(), phi: p, phi_clamped: p.max(0.0), share: s })
            .collect();
        let players = self.players(&distinct);
        let n = distinct.len();
        let coalition = |members: &[usize], k: Option<usize>| {
            let s = k.map(|k| &self.sets[k]);
            Coalition {
                channels: members.iter().map(|&i| distinct[i].to_string()).collect(),
                conversions: s.map_or(0, |s| s.conversions),
                non_conversions: s.map_or(0, |s| s.non_conversions),
                value: s.map_or(0.0, |s| s.v),
            }
        };
        let (coalitions, coalitions_complete) = if n <= EXPLAIN_ALL_COALITIONS_MAX {
            let mut buf = Vec::new();
            let list = (0..(1u64 << n))
                .map(|m| {
                    let members: Vec<usize> = (0..n).filter(|i| m >> i & 1 == 1).collect();
                    coalition(&members, self.lookup(&players, m, &mut buf))
                })
                .collect();
            (list, true)
        } else {
            let mut seen = self.seen_subsets(&players);
            for (_, m) in &mut seen {
                m.sort_unstable();
            }
            seen.sort_by(|a, b| (a.1.len(), &a.1).cmp(&(b.1.len(), &b.1)));
            (seen.iter().map(|(k, m)| coalition(m, Some(*k))).collect(), false)
        };
        ShapleyExplanation {
            model_version: self.version.clone(),
            method,
            fallback_linear,
            channels,
            coalitions,
            coalitions_complete,
        }
    }

    /// Shapley values of every channel seen in the game over all channels:
    /// exact (subset transform) up to [`GLOBAL_EXACT_MAX`] channels, else a
    /// Monte Carlo estimate of [`DEFAULT_PERMUTATIONS`] permutations drawn
    /// with `seed`, with standard errors.
    pub fn global_values(&self, seed: u64) -> GlobalShapley {
        if self.channels.len() <= GLOBAL_EXACT_MAX {
            let m = self.channels.len();
            let mut table = vec![0.0; 1usize << m];
            for s in &self.sets {
                let mask: usize = s.ids.iter().map(|&i| 1usize << i).sum();
                table[mask] = s.v;
            }
            let phi = shapley_values_table(m, &table);
            return self.global(ShapleyMethod::Subsets, phi, None, None, None);
        }
        self.global_values_sampled(seed, DEFAULT_PERMUTATIONS)
    }

    /// Exact Shapley values of the game over all channels by the seen-sets
    /// pass, for any number of channels: O(seen sets x set size).
    pub fn global_values_exact(&self) -> GlobalShapley {
        let m = self.channels.len();
        let members: Vec<Vec<usize>> = self.sets.iter().map(|s| s.ids.iter().map(|&i| i as usize).collect()).collect();
        let phi = self.phi_seen_sets(m, self.sets.iter().zip(&members).map(|(s, m)| (s.v, m.as_slice())));
        self.global(ShapleyMethod::SeenSets, phi, None, None, None)
    }

    /// Monte Carlo estimate of the global values over `permutations` random
    /// orders of all channels drawn from ChaCha8 seeded with `seed` (the
    /// same draws as [`shapley_monte_carlo`] for the same n and seed). Only
    /// prefixes no larger than the largest seen set can be worth anything,
    /// and a prefix is looked up by an order-free XOR hash of its channels.
    pub fn global_values_sampled(&self, seed: u64, permutations: u64) -> GlobalShapley {
        let m = self.channels.len();
        // Zobrist keys from a fixed stream: only for hashing, not for sampling.
        let mut key_rng = ChaCha8Rng::seed_from_u64(0x5eed_5e75);
        let keys: Vec<u64> = (0..m).map(|_| rand::Rng::gen::<u64>(&mut key_rng)).collect();
        let mut by_hash: HashMap<u64, Vec<usize>> = HashMap::new();
        for (k, s) in self.sets.iter().enumerate() {
            if s.v != 0.0 {
                let h = s.ids.iter().fold(0u64, |h, &i| h ^ keys[i as usize]);
                by_hash.entry(h).or_default().push(k);
            }
        }
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut perm: Vec<usize> = (0..m).collect();
        let mut pos = vec![0usize; m];
        let (mut sum, mut sumsq) = (vec![0.0; m], vec![0.0; m]);
        for _ in 0..permutations {
            perm.shuffle(&mut rng);
            for (j, &c) in perm.iter().enumerate() {
                pos[c] = j;
            }
            let mut h = 0u64;
            let mut prev = 0.0;
            for (j, &c) in perm.iter().enumerate() {
                let size = j + 1;
                if size > self.max_set_len {
                    if prev != 0.0 {
                        sum[c] -= prev;
                        sumsq[c] += prev * prev;
                    }
                    break;
                }
                h ^= keys[c];
                let cur = by_hash.get(&h).and_then(|ks| {
                    ks.iter()
                        .map(|&k| &self.sets[k])
                        .find(|s| s.ids.len() == size && s.ids.iter().all(|&i| pos[i as usize] <= j))
                        .map(|s| s.v)
                });
                let cur = cur.unwrap_or(0.0);
                let d = cur - prev;
                if d != 0.0 {
                    sum[c] += d;
                    sumsq[c] += d * d;
                }
                prev = cur;
            }
        }
        let est = finish_estimate(sum, sumsq, permutations);
        self.global(ShapleyMethod::MonteCarlo, est.values, Some(est.std_errors), Some(seed), Some(permutations))
    }

    fn global(
        &self,
        method: ShapleyMethod,
        phi: Vec<f64>,
        se: Option<Vec<f64>>,
        seed: Option<u64>,
        permutations: Option<u64>,
    ) -> GlobalShapley {
        let all: Vec<u32> = (0..self.channels.len() as u32).collect();
        let grand = self.set_index.get(&all[..]).map_or(0.0, |&i| self.sets[i].v);
        let channels = self
            .channels
            .iter()
            .enumerate()
            .map(|(i, c)| GlobalChannelValue {
                channel: c.clone(),
                value: phi[i],
                std_error: se.as_ref().map(|s| s[i]),
            })
            .collect();
        GlobalShapley {
            model_version: self.version.clone(),
            method,
            seed,
            permutations,
            grand_coalition_value: grand,
            channels,
        }
    }
}

/// Negative values to 0, the rest normalized; linear when nothing is
/// positive. Returns (shares, fell back to linear).
pub(crate) fn clamp_normalize(values: &[f64]) -> (Vec<f64>, bool) {
    let clamped: Vec<f64> = values.iter().map(|&v| if v > 0.0 && v.is_finite() { v } else { 0.0 }).collect();
    let sum: f64 = clamped.iter().sum();
    if sum > 0.0 && sum.is_finite() {
        (clamped.iter().map(|v| v / sum).collect(), false)
    } else {
        let n = values.len().max(1) as f64;
        (vec![1.0 / n; values.len()], true)
    }
}

/// The channel a touch is counted under: `channel` when the model knows
/// it, [`OVERFLOW_CHANNEL`] when it is unknown and sorts after the largest
/// kept channel of statistics at their cap (`overflow_above`), else itself
/// (a channel never seen).
pub(crate) fn bucket<'a>(known: bool, overflow_above: Option<&str>, channel: &'a str) -> &'a str {
    if !known && overflow_above.is_some_and(|max| channel > max) {
        OVERFLOW_CHANNEL
    } else {
        channel
    }
}

/// Credits a path: every touch is counted under `bucket(channel)`; the
/// distinct buckets in order of first appearance get `shares_of` them, and
/// each bucket's share is split evenly over its touches. Without a bucket
/// this is [`split_by_channel`] over the distinct channels.
pub(crate) fn credit_bucketed<'a>(
    path: &'a [Touch],
    bucket: impl Fn(&'a str) -> &'a str,
    shares_of: impl FnOnce(&[&'a str]) -> Vec<f64>,
) -> Vec<f64> {
    let mapped: Vec<&str> = path.iter().map(|t| bucket(t.channel.as_str())).collect();
    let distinct = dedup_keep_first(&mapped);
    let shares = shares_of(&distinct);
    let by_channel: HashMap<&str, f64> = distinct.iter().copied().zip(shares.iter().copied()).collect();
    let mut counts: HashMap<&str, usize> = HashMap::with_capacity(distinct.len());
    for m in &mapped {
        *counts.entry(m).or_default() += 1;
    }
    mapped.iter().map(|m| by_channel[m] / counts[m] as f64).collect()
}

/// Drops repeated channels, keeping first occurrences in order.
pub(crate) fn dedup_keep_first<'a>(channels: &[&'a str]) -> Vec<&'a str> {
    let mut seen = std::collections::HashSet::with_capacity(channels.len());
    channels.iter().copied().filter(|c| seen.insert(*c)).collect()
}

impl Model for ShapleyModel {
    fn id(&self) -> ModelId {
        ModelId::Shapley
    }
    fn version(&self) -> Option<&str> {
        Some(&self.version)
    }
    fn credit(&self, path: &[Touch], _conversion_ts: i64) -> Vec<f64> {
        credit_bucketed(path, |c| self.bucket(c), |distinct| self.shares(distinct).1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};

    fn random_stats(channels: usize, paths: usize, max_len: usize, seed: u64) -> PathStats {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let names: Vec<String> = (0..channels).map(|i| format!("ch{i:02}")).collect();
        let mut s = PathStats::new(1);
        for _ in 0..paths {
            let len = rng.gen_range(1..=max_len);
            let p: Vec<&str> = (0..len).map(|_| names[rng.gen_range(0..channels)].as_str()).collect();
            s.add_path(&p, rng.gen_bool(0.3));
        }
        s
    }

    #[test]
    fn subsets_and_seen_sets_agree() {
        let stats = random_stats(14, 3000, 6, 1);
        let m = ShapleyModel::fit(&stats);
        let names: Vec<&str> = m.channels().iter().map(String::as_str).collect();
        let players = m.players(&names);
        let (a, how) = m.phi(&players);
        assert_eq!(how, ShapleyMethod::Subsets);
        let seen = m.seen_subsets(&players);
        let b = m.phi_seen_sets(players.len(), seen.iter().map(|(k, mm)| (m.sets[*k].v, mm.as_slice())));
        for (x, y) in a.iter().zip(&b) {
            assert!((x - y).abs() < 1e-12, "{x} {y}");
        }
        let g1 = m.global_values(0);
        let g2 = m.global_values_exact();
        for (x, y) in g1.channels.iter().zip(&g2.channels) {
            assert!((x.value - y.value).abs() < 1e-12);
        }
    }

    #[test]
    fn sampled_global_uses_the_generic_permutations() {
        // Same seed and n: the set-based sampler and the generic one draw the
        // same permutations, so they give the same estimate.
        let stats = random_stats(12, 2000, 5, 2);
        let m = ShapleyModel::fit(&stats);
        let n = m.channels().len();
        let mut table = vec![0.0; 1 << n];
        for s in &m.sets {
            table[s.ids.iter().map(|&i| 1usize << i).sum::<usize>()] = s.v;
        }
        let a = m.global_values_sampled(7, 500);
        let b = shapley_monte_carlo(n, |mask| table[mask as usize], 500, 7);
        for (i, c) in a.channels.iter().enumerate() {
            assert!((c.value - b.values[i]).abs() < 1e-12, "{} {}", c.value, b.values[i]);
            assert!((c.std_error.unwrap() - b.std_errors[i]).abs() < 1e-9);
        }
    }
}
