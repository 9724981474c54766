//! How stable are the data-driven models' channel shares? A bootstrap over
//! closed paths.
//!
//! ## Channel share of a data-driven model
//! For a model fitted on a set of closed paths, the share of channel c is
//! the model's credit to c summed over the set's converting paths, divided
//! by the number of converting paths. Each conversion's credit sums to 1,
//! so the shares of all channels sum to 1; a channel's share is what the
//! model's credit rows for those conversions would add up to for c, over
//! the number of conversions, had one snapshot fitted on exactly these
//! paths credited them all (`apportion replay` does that; `serve` refits as
//! it goes, so its rows can differ). The credit is computed by the engine's
//! own models ([`ShapleyModel`], [`MarkovModel`] through the `Model`
//! trait), so the definition cannot drift from the credit rows. Both models
//! credit a conversion from its set of distinct channels alone, so the
//! computation runs once per distinct channel set, weighted by its count.
//!
//! ## The bootstrap
//! The nonparametric bootstrap (Efron 1979; Efron and Tibshirani 1993, An
//! Introduction to the Bootstrap, ch. 6 and 13): draw N paths with
//! replacement from the N closed paths, fit `shapley` and `markov` on the
//! resample with the engine's code, compute the shares; repeat B times. The
//! **point** value is the share of the fit on all paths; the interval is
//! the **percentile interval**, the (1 - level)/2 and (1 + level)/2
//! quantiles of the B resampled shares (Efron and Tibshirani 1993, ch. 13),
//! quantiles by linear interpolation between order statistics (Hyndman and
//! Fan 1996, definition 7).
//!
//! ## Limits (also stated in the report)
//! Paths are resampled, not users: a user with several paths, and paths
//! that are not independent of each other, count as independent draws, so
//! intervals can be too narrow. An interval says how much the fit moves
//! with data like this, not whether the credit is causal, and nothing here
//! measures the bias that targeting or selection puts in observational
//! credit (the lift-test check is for that). A percentile interval from a
//! finite B is itself an estimate.
//!
//! ## Determinism
//! The paths are put in `path_id` order first, so the order of files and
//! rows does not matter. Resample b draws its paths from ChaCha8 seeded with `seed` on stream b,
//! so resample b is the same whatever thread runs it: the result depends
//! on (paths, seed, B, level, order), never on the number of threads. The
//! resamples are spread over threads with `std::thread::scope`.

use std::collections::HashMap;

use apportion_engine::datadriven::{MarkovModel, PathStats, ShapleyModel};
use apportion_engine::{Interaction, Model, Touch};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::rows::PathRecord;
use crate::ReportError;

/// Default number of resamples.
pub const DEFAULT_RESAMPLES: usize = 200;
/// Default seed.
pub const DEFAULT_SEED: u64 = 20_260_301;
/// Default interval level.
pub const DEFAULT_LEVEL: f64 = 0.9;
/// The models refitted, in report order.
pub const MODELS: [&str; 2] = ["shapley", "markov"];

/// Bootstrap settings.
#[derive(Debug, Clone, PartialEq)]
pub struct BootstrapOptions {
    /// Number of resamples B (at least 2).
    pub resamples: usize,
    /// Seed of the resampling.
    pub seed: u64,
    /// Interval level, e.g. 0.9 for a 90 % interval.
    pub level: f64,
    /// Markov order of the refit (1..=4).
    pub markov_order: usize,
    /// Threads to spread resamples over (at least 1).
    pub threads: usize,
}

impl Default for BootstrapOptions {
    fn default() -> Self {
        BootstrapOptions {
            resamples: DEFAULT_RESAMPLES,
            seed: DEFAULT_SEED,
            level: DEFAULT_LEVEL,
            markov_order: 1,
            threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
        }
    }
}

/// One model's share of one channel: the point value and its interval.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShareInterval {
    /// `shapley` or `markov`.
    pub model: String,
    /// Share in the fit on all paths.
    pub point: f64,
    /// Low end of the percentile interval.
    pub low: f64,
    /// High end of the percentile interval.
    pub high: f64,
    /// The share of this channel in the model's credit rows (credit to the
    /// channel over credit to every channel but `unattributed`), when the
    /// report groups by channel and the rows hold the model.
    pub credit_rows: Option<f64>,
}

/// One channel's shares.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ChannelShares {
    /// Channel name.
    pub channel: String,
    /// One entry per model of [`MODELS`].
    pub models: Vec<ShareInterval>,
}

/// The bootstrap's result.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BootstrapResult {
    /// The method, in words.
    pub method: String,
    /// Resamples drawn.
    pub resamples: usize,
    /// Seed.
    pub seed: u64,
    /// Interval level.
    pub level: f64,
    /// Markov order of the refit.
    pub markov_order: usize,
    /// Closed paths resampled.
    pub paths: u64,
    /// Converting paths among them.
    pub converting_paths: u64,
    /// Resamples without a converting path (their shares count as 0).
    pub resamples_without_conversions: usize,
    /// Channels in name order.
    pub channels: Vec<ChannelShares>,
}

/// Quantile `p` of sorted values by linear interpolation between order
/// statistics (Hyndman and Fan 1996, definition 7: `h = (n - 1) p`).
pub fn quantile(sorted: &[f64], p: f64) -> f64 {
    match sorted.len() {
        0 => f64::NAN,
        1 => sorted[0],
        n => {
            let h = (n - 1) as f64 * p.clamp(0.0, 1.0);
            let lo = h.floor() as usize;
            let hi = (lo + 1).min(n - 1);
            sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
        }
    }
}

/// The paths in compact form: channel ids, distinct sequences and the
/// distinct channel sets of converting sequences.
struct Compact {
    channels: Vec<String>,
    /// Distinct (channel sequence, converted) with its channel-set id.
    uniques: Vec<(Vec<u32>, bool, usize)>,
    /// Per path: its unique id.
    items: Vec<u32>,
    /// Distinct channel sets (sorted channel ids) as one-touch-per-channel paths.
    sets: Vec<Vec<Touch>>,
    set_ids: Vec<Vec<u32>>,
}

impl Compact {
    fn new(paths: &[&PathRecord]) -> Self {
        let mut names: Vec<String> = paths.iter().flat_map(|p| p.channels.iter().cloned()).collect();
        names.sort_unstable();
        names.dedup();
        let id: HashMap<&str, u32> = names.iter().enumerate().map(|(i, c)| (c.as_str(), i as u32)).collect();
        let mut unique_ids: HashMap<(Vec<u32>, bool), u32> = HashMap::new();
        let mut uniques = Vec::new();
        let mut set_index: HashMap<Vec<u32>, usize> = HashMap::new();
        let mut set_ids: Vec<Vec<u32>> = Vec::new();
        let mut items = Vec::with_capacity(paths.len());
        for p in paths {
            let seq: Vec<u32> = p.channels.iter().map(|c| id[c.as_str()]).collect();
            let key = (seq, p.converted);
            let u = match unique_ids.get(&key) {
                Some(&u) => u,
                None => {
                    let mut set = key.0.clone();
                    set.sort_unstable();
                    set.dedup();
                    let next = set_ids.len();
                    let s = *set_index.entry(set.clone()).or_insert_with(|| {
                        set_ids.push(set);
                        next
                    });
                    let u = uniques.len() as u32;
                    uniques.push((key.0.clone(), key.1, s));
                    unique_ids.insert(key, u);
                    u
                }
            };
            items.push(u);
        }
        let sets = set_ids
            .iter()
            .map(|set| {
                set.iter()
                    .enumerate()
                    .map(|(i, &c)| Touch {
                        event_id: String::new(),
                        ts: 0,
                        seq: i as u64,
                        channel: names[c as usize].clone(),
                        campaign: None,
                        interaction: Interaction::Click,
                    })
                    .collect()
            })
            .collect();
        Compact { channels: names, uniques, items, sets, set_ids }
    }

    /// Fits both models on the paths counted by `counts` (per unique) and
    /// returns each channel's share under each model, and the number of
    /// converting paths.
    fn shares(&self, counts: &[u32], order: usize) -> (Vec<[f64; 2]>, u64) {
        let mut stats = PathStats::new(order);
        let mut set_weight = vec![0u64; self.sets.len()];
        for ((seq, converted, set), &n) in self.uniques.iter().zip(counts) {
            if n == 0 {
                continue;
            }
            let chans: Vec<&str> = seq.iter().map(|&c| self.channels[c as usize].as_str()).collect();
            for _ in 0..n {
                stats.add_path(&chans, *converted);
            }
            if *converted {
                set_weight[*set] += n as u64;
            }
        }
        let converting: u64 = set_weight.iter().sum();
        let mut out = vec![[0.0; 2]; self.channels.len()];
        if converting == 0 {
            return (out, 0);
        }
        let shapley = ShapleyModel::fit(&stats);
        let markov = MarkovModel::fit(&stats);
        let models: [&dyn Model; 2] = [&shapley, &markov];
        for (s, &w) in set_weight.iter().enumerate() {
            if w == 0 {
                continue;
            }
            for (mi, m) in models.iter().enumerate() {
                for (&c, credit) in self.set_ids[s].iter().zip(m.credit(&self.sets[s], 0)) {
                    out[c as usize][mi] += credit * w as f64;
                }
            }
        }
        for x in &mut out {
            x[0] /= converting as f64;
            x[1] /= converting as f64;
        }
        (out, converting)
    }
}

/// Runs the bootstrap (module docs) on closed paths.
pub fn bootstrap(paths: &[PathRecord], opts: &BootstrapOptions) -> Result<BootstrapResult, ReportError> {
    let invalid = |m: String| Err(ReportError::Invalid(m));
    if paths.is_empty() {
        return invalid("the bootstrap needs closed paths, and --paths gave none".into());
    }
    if opts.resamples < 2 {
        return invalid(format!("the bootstrap needs at least 2 resamples, got {}", opts.resamples));
    }
    if !(opts.level > 0.0 && opts.level < 1.0) {
        return invalid(format!("the interval level must be between 0 and 1, got {}", opts.level));
    }
    if let Err(e) = PathStats::try_new(opts.markov_order) {
        return invalid(e.to_string());
    }
    if opts.threads == 0 {
        return invalid("at least one thread is needed".into());
    }
    // Resampling indexes into the paths, so fix their order first: the
    // result then does not depend on the order of files or rows.
    let mut sorted: Vec<&PathRecord> = paths.iter().collect();
    sorted.sort_by(|a, b| (&a.path_id, &a.channels, a.converted).cmp(&(&b.path_id, &b.channels, b.converted)));
    let c = Compact::new(&sorted);
    let n = c.items.len();
    let mut all = vec![0u32; c.uniques.len()];
    for &u in &c.items {
        all[u as usize] += 1;
    }
    let (point, converting) = c.shares(&all, opts.markov_order);

    let resample = |b: usize| -> (Vec<[f64; 2]>, u64) {
        let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
        rng.set_stream(b as u64);
        let mut counts = vec![0u32; c.uniques.len()];
        for _ in 0..n {
            counts[c.items[rng.gen_range(0..n)] as usize] += 1;
        }
        c.shares(&counts, opts.markov_order)
    };
    let threads = opts.threads.min(opts.resamples);
    let mut results: Vec<Option<(Vec<[f64; 2]>, u64)>> = vec![None; opts.resamples];
    std::thread::scope(|s| {
        let handles: Vec<_> = (0..threads)
            .map(|t| {
                let resample = &resample;
                s.spawn(move || (t..opts.resamples).step_by(threads).map(|b| (b, resample(b))).collect::<Vec<_>>())
            })
            .collect();
        for h in handles {
            for (b, r) in h.join().expect("a bootstrap thread panicked") {
                results[b] = Some(r);
            }
        }
    });
    let results: Vec<(Vec<[f64; 2]>, u64)> = results.into_iter().map(|r| r.expect("every resample ran")).collect();
    let empty = results.iter().filter(|r| r.1 == 0).count();
    let (qlo, qhi) = ((1.0 - opts.level) / 2.0, (1.0 + opts.level) / 2.0);
    let channels = c
        .channels
        .iter()
        .enumerate()
        .map(|(k, name)| ChannelShares {
            channel: name.clone(),
            models: MODELS
                .iter()
                .enumerate()
                .map(|(mi, m)| {
                    let mut xs: Vec<f64> = results.iter().map(|r| r.0[k][mi]).collect();
                    xs.sort_by(f64::total_cmp);
                    ShareInterval {
                        model: m.to_string(),
                        point: point[k][mi],
                        low: quantile(&xs, qlo),
                        high: quantile(&xs, qhi),
                        credit_rows: None,
                    }
                })
                .collect(),
        })
        .collect();
    Ok(BootstrapResult {
        method: format!(
            "percentile bootstrap over closed paths: {} resamples of {n} paths drawn with replacement, shapley and \
             markov (order {}) refitted on each, {:.0} % intervals",
            opts.resamples,
            opts.markov_order,
            opts.level * 100.0
        ),
        resamples: opts.resamples,
        seed: opts.seed,
        level: opts.level,
        markov_order: opts.markov_order,
        paths: n as u64,
        converting_paths: converting,
        resamples_without_conversions: empty,
        channels,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantile_definition_7() {
        // R's quantile(1:10, c(0.05, 0.5, 0.95)) (type 7, R's default) is
        // 1.45, 5.5, 9.55 (derived by hand from h = (n - 1) p: 0.45, 4.5, 8.55).
        let xs: Vec<f64> = (1..=10).map(f64::from).collect();
        assert!((quantile(&xs, 0.05) - 1.45).abs() < 1e-12);
        assert!((quantile(&xs, 0.5) - 5.5).abs() < 1e-12);
        assert!((quantile(&xs, 0.95) - 9.55).abs() < 1e-12);
        assert_eq!((quantile(&xs, 0.0), quantile(&xs, 1.0)), (1.0, 10.0));
        assert_eq!(quantile(&[3.0], 0.3), 3.0);
    }

    fn path(id: usize, channels: &[&str], converted: bool) -> PathRecord {
        PathRecord { path_id: format!("p{id}"), converted, channels: channels.iter().map(|c| c.to_string()).collect() }
    }

    #[test]
    fn point_shares_are_what_the_models_credit() {
        // Two channels, every converting path is {a} alone or {a, b}:
        // v({a}) = 1/2 (1 of 2 converts), v({a,b}) = 1/1, v({b}) = 0 (1 path,
        // no conversion). Shapley on {a,b}: phi(a) = 1/2 (v(a) - 0) + 1/2
        // (v(ab) - v(b)) = 3/4, phi(b) = 1/4 (derived by hand from the
        // definition, Shapley 1953). Converting paths: {a} (a gets 1) and
        // {a,b} (3/4, 1/4): shares a = 7/8, b = 1/8.
        let paths =
            vec![path(0, &["a"], true), path(1, &["a"], false), path(2, &["a", "b"], true), path(3, &["b"], false)];
        let r = bootstrap(&paths, &BootstrapOptions { resamples: 20, threads: 1, ..Default::default() }).unwrap();
        assert_eq!((r.paths, r.converting_paths), (4, 2));
        let a = &r.channels[0];
        assert_eq!(a.channel, "a");
        assert!((a.models[0].point - 0.875).abs() < 1e-12, "{:?}", a.models[0]);
        // Markov (order 1): START->a 3, START->b 1; a->CONV 1, a->NULL 1,
        // a->b 1; b->CONV 1, b->NULL 1. From b: 1/2; from a: 1/3 + 1/3 * 1/2
        // = 1/2; P = 3/4 * 1/2 + 1/4 * 1/2 = 1/2. Without a: 1/4 * 1/2 = 1/8,
        // RE(a) = 3/4; without b: 3/4 * 1/3 = 1/4, RE(b) = 1/2. On {a,b}:
        // a 3/5, b 2/5, so shares a = (1 + 3/5) / 2 = 4/5, b = 1/5 (derived
        // by hand from the removal-effect definition, Anderl et al. 2016).
        assert!((a.models[1].point - 0.8).abs() < 1e-12, "{:?}", a.models[1]);
        let b = &r.channels[1];
        assert!((b.models[1].point - 0.2).abs() < 1e-12, "{:?}", b.models[1]);
        assert!((b.models[0].point - 0.125).abs() < 1e-12, "{:?}", b.models[0]);
        for ch in &r.channels {
            for m in &ch.models {
                assert!(m.low <= m.high && (0.0..=1.0).contains(&m.low) && (0.0..=1.0).contains(&m.high));
            }
        }
    }

    #[test]
    fn bad_options_are_refused() {
        let paths = vec![path(0, &["a"], true)];
        let o = BootstrapOptions::default();
        assert!(bootstrap(&[], &o).is_err());
        assert!(bootstrap(&paths, &BootstrapOptions { resamples: 1, ..o.clone() }).is_err());
        assert!(bootstrap(&paths, &BootstrapOptions { level: 1.0, ..o.clone() }).is_err());
        assert!(bootstrap(&paths, &BootstrapOptions { markov_order: 5, ..o.clone() }).is_err());
        assert!(bootstrap(&paths, &BootstrapOptions { threads: 0, ..o }).is_err());
    }
}
