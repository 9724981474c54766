//! Simulated lift tests: what an experiment on one channel would find in
//! the ground-truth scenario, where the answer is known.
//!
//! The true incremental conversions of channel c are, over the users
//! exposed to c, the sum of `p(E) - p(E without c)`: each user's
//! conversion probability with their exposure set E, minus the same user's
//! probability had c not been shown (the scenario's logistic model, intent
//! included). This is [`crate::simulate::ChannelTruth::incremental_conversions`],
//! recomputed here per user so that the experiment also gets a standard
//! error.
//!
//! The standard error is that of an idealized experiment that observes
//! every exposed user once with the channel and once without it,
//! independently: the variance of a sum of independent Bernoulli
//! variables, `sum of p(E)(1 - p(E)) + p(E without c)(1 - p(E without c))`.
//! A real holdout sees each user in one arm only and has a larger one;
//! callers that want a noisier experiment scale it.
//!
//! The journeys are drawn exactly as [`crate::simulate::simulate`] draws
//! them (same seed, same order of draws), without writing events; a test
//! checks that the two agree.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::scenario::{sigmoid, Scenario};
use crate::simulate::SimOptions;
use crate::LoadError;

/// What an experiment on one channel would measure over a whole simulation.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SimulatedLift {
    /// The tested channel.
    pub channel: String,
    /// Users exposed to it.
    pub exposed_users: u64,
    /// True incremental conversions (module docs).
    pub incremental_conversions: f64,
    /// Standard error of the idealized experiment (module docs).
    pub std_error: f64,
    /// First instant of the simulated period, epoch ms.
    pub start_ms: i64,
    /// End of the simulated period (exclusive): after the last possible
    /// conversion, epoch ms.
    pub end_ms: i64,
}

/// The true lift of `channel` over the users `simulate(scenario, opts)`
/// draws (module docs).
pub fn simulated_lift(scenario: &Scenario, opts: &SimOptions, channel: &str) -> Result<SimulatedLift, LoadError> {
    scenario.validate()?;
    let c = scenario
        .channel_index(channel)
        .ok_or_else(|| LoadError::Scenario(format!("no channel {channel:?} in the scenario")))?;
    let effect = scenario.channels[c].logit_effect;
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let span = opts.days.max(1) as i64 * 86_400_000;
    let (mut exposed, mut lift, mut var) = (0u64, 0.0, 0.0);
    for _ in 0..opts.users {
        // The same draws, in the same order, as simulate().
        let _start: i64 = rng.gen_range(0..span);
        let j = scenario.journey(&mut rng);
        if j.exposed >> c & 1 == 1 {
            let full = scenario.logit(j.base_logit, j.exposed);
            let (p1, p0) = (sigmoid(full), sigmoid(full - effect));
            exposed += 1;
            lift += p1 - p0;
            var += p1 * (1.0 - p1) + p0 * (1.0 - p0);
        }
    }
    Ok(SimulatedLift {
        channel: channel.to_string(),
        exposed_users: exposed,
        incremental_conversions: lift,
        std_error: var.sqrt(),
        start_ms: opts.start_ms,
        end_ms: opts.start_ms + span + scenario.journey_max_ms + scenario.conversion_delay_max_ms + 1,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::simulate::simulate;

    #[test]
    fn agrees_with_the_simulators_truth() {
        let scenario = Scenario::example_shop();
        let opts = SimOptions::new(4000, 21);
        let truth = simulate(&scenario, &opts, std::io::sink()).unwrap();
        for t in &truth.channels {
            let l = simulated_lift(&scenario, &opts, &t.channel).unwrap();
            assert_eq!(l.exposed_users, t.exposed_users, "{}", t.channel);
            let tol = 1e-9 * t.incremental_conversions.abs().max(1.0);
            assert!((l.incremental_conversions - t.incremental_conversions).abs() < tol, "{}", t.channel);
            assert!(l.std_error > 0.0);
        }
        assert!(simulated_lift(&scenario, &opts, "carrier_pigeon").is_err());
    }

    #[test]
    fn period_covers_every_conversion() {
        let scenario = Scenario::example_shop();
        let opts = SimOptions::new(500, 3);
        let mut buf = Vec::new();
        simulate(&scenario, &opts, &mut buf).unwrap();
        let l = simulated_lift(&scenario, &opts, "email").unwrap();
        for line in String::from_utf8(buf).unwrap().lines() {
            let ev = apportion_engine::contract::parse_event(line.as_bytes()).unwrap();
            assert!(l.start_ms <= ev.timestamp_ms && ev.timestamp_ms < l.end_ms);
        }
    }
}
