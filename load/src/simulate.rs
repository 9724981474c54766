//! The ground-truth simulator: one journey per user, written as input
//! events, plus the true effect of every channel.
//!
//! The true effect of channel c is its **incremental conversions**: over the
//! users exposed to c, the sum of `p(S) - p(S without c)`, where S is the
//! user's exposure set and p the scenario's conversion probability for that
//! user (intent included). It is the expected number of conversions that
//! would be lost had c's touches not been shown: the causal counterpart of
//! "conversions credited to c". It is exactly 0 for a channel with no effect,
//! whoever it was shown to, and it grows with both the channel's lift and
//! its reach, as credit totals do.

use std::io::Write;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::lines::{LineWriter, TimeForm};
use crate::scenario::{sigmoid, Exposure, Scenario, SimJourney};
use crate::LoadError;

/// 2026-03-01T00:00:00Z, the default start of simulated time.
pub const DEFAULT_START_MS: i64 = 1_772_323_200_000;

/// What to simulate.
#[derive(Debug, Clone, PartialEq)]
pub struct SimOptions {
    /// Number of users (one journey each).
    pub users: u64,
    /// Seed of the random generator.
    pub seed: u64,
    /// Earliest journey start, epoch ms.
    pub start_ms: i64,
    /// Journeys start uniformly over this many days.
    pub days: u32,
}

impl SimOptions {
    /// `users` users with `seed`, starting 2026-03-01 over 60 days.
    pub fn new(users: u64, seed: u64) -> Self {
        SimOptions { users, seed, start_ms: DEFAULT_START_MS, days: 60 }
    }
}

/// True effect and exposure of one channel.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ChannelTruth {
    /// Channel name.
    pub channel: String,
    /// The configured effect on the log-odds of converting.
    pub logit_effect: f64,
    /// True when the effect is 0.
    pub does_nothing: bool,
    /// True when the channel is shown by intent targeting, outside the mix.
    pub targeted: bool,
    /// Users exposed at least once.
    pub exposed_users: u64,
    /// Touches of the channel.
    pub touches: u64,
    /// Expected conversions lost without the channel (see module docs).
    pub incremental_conversions: f64,
    /// `incremental_conversions` over the sum for all channels.
    pub incremental_share: f64,
    /// Observed conversion rate of exposed users.
    pub conversion_rate_exposed: f64,
    /// Observed conversion rate of the other users.
    pub conversion_rate_unexposed: f64,
}

/// The ground truth of one simulation (the `--truth` file).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Truth {
    /// The scenario, with every configured effect.
    pub scenario: Scenario,
    /// Seed.
    pub seed: u64,
    /// Users simulated.
    pub users: u64,
    /// Event lines written.
    pub events: u64,
    /// Touch events.
    pub touches: u64,
    /// Conversions drawn.
    pub conversions: u64,
    /// Conversions of users exposed to no channel with an effect: every
    /// model has to give all of their credit to channels that do nothing.
    pub conversions_without_effective_channel: u64,
    /// Sum of every user's conversion probability.
    pub expected_conversions: f64,
    /// Sum of every user's conversion probability with no channel effect at
    /// all (what would have sold anyway).
    pub expected_conversions_without_marketing: f64,
    /// One entry per channel, in scenario order.
    pub channels: Vec<ChannelTruth>,
}

impl Truth {
    /// Channel names in scenario order.
    pub fn channel_names(&self) -> Vec<&str> {
        self.channels.iter().map(|c| c.channel.as_str()).collect()
    }
}

#[derive(Default, Clone)]
struct Acc {
    exposed: u64,
    touches: u64,
    incremental: f64,
    exposed_conv: u64,
}

/// Adds up the truth journey by journey.
pub struct TruthAccumulator {
    scenario: Scenario,
    acc: Vec<Acc>,
    users: u64,
    touches: u64,
    conversions: u64,
    conversions_null_only: u64,
    effective_mask: u64,
    expected: f64,
    expected_without: f64,
}

impl TruthAccumulator {
    /// An empty accumulator for `scenario`.
    pub fn new(scenario: &Scenario) -> Self {
        TruthAccumulator {
            scenario: scenario.clone(),
            acc: vec![Acc::default(); scenario.channels.len()],
            users: 0,
            touches: 0,
            conversions: 0,
            conversions_null_only: 0,
            effective_mask: scenario
                .channels
                .iter()
                .enumerate()
                .filter(|(_, c)| c.logit_effect != 0.0)
                .fold(0u64, |m, (i, _)| m | 1 << i),
            expected: 0.0,
            expected_without: 0.0,
        }
    }

    /// Counts one journey.
    pub fn add(&mut self, j: &SimJourney) {
        self.users += 1;
        self.touches += j.touches.len() as u64;
        self.conversions += j.converted as u64;
        self.conversions_null_only += (j.converted && j.exposed & self.effective_mask == 0) as u64;
        let full = self.scenario.logit(j.base_logit, j.exposed);
        self.expected += sigmoid(full);
        self.expected_without += sigmoid(j.base_logit);
        for t in &j.touches {
            self.acc[t.channel as usize].touches += 1;
        }
        for (i, c) in self.scenario.channels.iter().enumerate() {
            if j.exposed >> i & 1 == 1 {
                let a = &mut self.acc[i];
                a.exposed += 1;
                a.exposed_conv += j.converted as u64;
                a.incremental += sigmoid(full) - sigmoid(full - c.logit_effect);
            }
        }
    }

    /// The truth, given the seed and the number of lines written.
    pub fn finish(self, seed: u64, events: u64) -> Truth {
        let total: f64 = self.acc.iter().map(|a| a.incremental).sum();
        let channels = self
            .scenario
            .channels
            .iter()
            .zip(&self.acc)
            .map(|(c, a)| {
                let unexposed = self.users - a.exposed;
                let rate = |num: u64, den: u64| if den == 0 { 0.0 } else { num as f64 / den as f64 };
                ChannelTruth {
                    channel: c.name.clone(),
                    logit_effect: c.logit_effect,
                    does_nothing: c.logit_effect == 0.0,
                    targeted: matches!(c.exposure, Exposure::Targeted { .. }),
                    exposed_users: a.exposed,
                    touches: a.touches,
                    incremental_conversions: a.incremental,
                    incremental_share: if total > 0.0 { a.incremental / total } else { 0.0 },
                    conversion_rate_exposed: rate(a.exposed_conv, a.exposed),
                    conversion_rate_unexposed: rate(self.conversions - a.exposed_conv, unexposed),
                }
            })
            .collect();
        Truth {
            scenario: self.scenario,
            seed,
            users: self.users,
            events,
            touches: self.touches,
            conversions: self.conversions,
            conversions_without_effective_channel: self.conversions_null_only,
            expected_conversions: self.expected,
            expected_conversions_without_marketing: self.expected_without,
            channels,
        }
    }
}

/// Simulates `opts.users` users and writes their events to `out`, user by
/// user (each user's events in time order; the file as a whole is not, as
/// from a per-user export). Every fourth user's timestamps are epoch
/// milliseconds, the rest RFC 3339, to exercise both input forms.
pub fn simulate<W: Write>(scenario: &Scenario, opts: &SimOptions, out: W) -> Result<Truth, LoadError> {
    scenario.validate()?;
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut w = LineWriter::new(out);
    let mut acc = TruthAccumulator::new(scenario);
    let span = opts.days.max(1) as i64 * 86_400_000;
    let prefix = format!("sim-{}-", opts.seed);
    let mut n = 0u64;
    for user in 0..opts.users {
        let start = opts.start_ms + rng.gen_range(0..span);
        let j = scenario.journey(&mut rng);
        let form = if user % 4 == 3 { TimeForm::EpochMs } else { TimeForm::Rfc3339 };
        for t in &j.touches {
            let c = &scenario.channels[t.channel as usize];
            n += 1;
            w.touch(
                (&prefix, n),
                ("sim-user-", user),
                start + t.offset_ms,
                form,
                &c.name,
                &c.campaigns[t.campaign as usize],
                t.view,
            )?;
        }
        if j.converted {
            n += 1;
            w.conversion(
                (&prefix, n),
                ("sim-user-", user),
                start + j.conversion_offset_ms,
                form,
                &scenario.goal,
                j.value_cents,
                &scenario.currency,
            )?;
        }
        acc.add(&j);
    }
    w.flush()?;
    Ok(acc.finish(opts.seed, w.lines()))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run(users: u64, seed: u64) -> (Vec<u8>, Truth) {
        let mut buf = Vec::new();
        let truth = simulate(&Scenario::example_shop(), &SimOptions::new(users, seed), &mut buf).unwrap();
        (buf, truth)
    }

    #[test]
    fn deterministic_for_a_seed() {
        let (a, ta) = run(3000, 42);
        let (b, tb) = run(3000, 42);
        assert_eq!(a, b, "same seed, same events");
        assert_eq!(ta, tb, "same seed, same truth");
        let (c, _) = run(3000, 43);
        assert_ne!(a, c, "another seed, other events");
    }

    #[test]
    fn truth_file_matches_the_configured_effects() {
        let scenario = Scenario::example_shop();
        let (_, truth) = run(20_000, 7);
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("truth.json");
        std::fs::write(&path, serde_json::to_vec_pretty(&truth).unwrap()).unwrap();
        let back: Truth = serde_json::from_slice(&std::fs::read(&path).unwrap()).unwrap();
        // serde_json (without its float_roundtrip feature) may read a
        // computed float back one unit in the last place off: compare those
        // with a tolerance, the configuration exactly.
        assert_eq!(back.scenario, scenario);
        assert_eq!(
            (back.seed, back.users, back.events, back.conversions),
            (7, 20_000, truth.events, truth.conversions)
        );
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * a.abs().max(1.0);
        for (b, t) in back.channels.iter().zip(&truth.channels) {
            assert!(close(b.incremental_conversions, t.incremental_conversions));
            assert!(close(b.conversion_rate_exposed, t.conversion_rate_exposed));
            assert_eq!((b.exposed_users, b.touches), (t.exposed_users, t.touches));
        }
        assert_eq!(back.channel_names(), scenario.channels.iter().map(|c| c.name.as_str()).collect::<Vec<_>>());
        let mut share = 0.0;
        for (t, c) in back.channels.iter().zip(&scenario.channels) {
            assert_eq!(t.logit_effect, c.logit_effect, "{}", c.name);
            assert_eq!(t.does_nothing, c.logit_effect == 0.0);
            assert!(t.exposed_users > 0 && t.touches >= t.exposed_users, "{}", c.name);
            if t.does_nothing {
                // sigmoid(x) - sigmoid(x - 0) is exactly 0.
                assert_eq!(t.incremental_conversions, 0.0, "{}", c.name);
            } else {
                assert!(t.incremental_conversions > 0.0, "{}", c.name);
            }
            share += t.incremental_share;
        }
        assert!((share - 1.0).abs() < 1e-12);
        // Ordering implied by the configuration: effect times reach.
        let inc = |n: &str| back.channels[scenario.channel_index(n).unwrap()].incremental_conversions;
        assert!(inc("paid_search") > inc("email") && inc("email") > inc("video"));
    }

    #[test]
    fn conversions_agree_with_their_expectation() {
        // Conversions are a sum of independent Bernoulli(p_i): the realized
        // count lies within 5 standard deviations of sum p_i (Chebyshev bound
        // 1/25 at worst; the normal approximation makes a miss ~1e-6).
        let (_, t) = run(20_000, 9);
        let sd = (t.expected_conversions).sqrt(); // >= sqrt(sum p(1-p))
        assert!((t.conversions as f64 - t.expected_conversions).abs() < 5.0 * sd, "{t:?}");
        assert!(t.expected_conversions > t.expected_conversions_without_marketing);
        assert!(t.conversions_without_effective_channel > 0);
        assert!(t.conversions_without_effective_channel < t.conversions / 2);
    }

    #[test]
    fn targeting_confound_shows_in_observed_rates() {
        // push does nothing, yet its users convert more often: they were
        // picked for high intent (selection bias, the point of the channel).
        let (_, t) = run(20_000, 5);
        let push = t.channels.iter().find(|c| c.channel == "push").unwrap();
        assert!(push.does_nothing && push.targeted);
        assert!(push.conversion_rate_exposed > 1.5 * push.conversion_rate_unexposed, "{push:?}");
        let social = t.channels.iter().find(|c| c.channel == "social").unwrap();
        assert!(social.conversion_rate_exposed < 1.3 * social.conversion_rate_unexposed, "{social:?}");
    }

    #[test]
    fn events_round_trip_through_the_engine_parser() {
        let (buf, truth) = run(500, 1);
        let text = String::from_utf8(buf).unwrap();
        let mut touches = 0;
        let mut conversions = 0;
        for line in text.lines() {
            let ev = apportion_engine::contract::parse_event(line.as_bytes()).unwrap();
            match ev.kind {
                apportion_engine::EventKind::Touch => touches += 1,
                _ => conversions += 1,
            }
            assert!(ev.user_id.starts_with("sim-user-"));
        }
        assert_eq!(touches, truth.touches);
        assert_eq!(conversions, truth.conversions);
        assert_eq!(touches + conversions, truth.events);
    }
}
