//! The generative model of the ground-truth scenario (load/README.md).
//!
//! One simulated user has one journey: a latent purchase intent, a random
//! sequence of touches from channels with given exposure frequencies, and a
//! conversion drawn from a logistic model in which every channel the user was
//! exposed to adds a fixed, known amount to the log-odds of buying. Some
//! channels add nothing. One channel is shown outside the random mix, mostly
//! to users with high intent (targeting), so that it looks useful in
//! observational data although it does nothing.
//!
//! Why exposure (a channel in the path at least once) and not a per-touch
//! lift: it makes the true effect of removing a channel from a journey exact
//! and cheap to compute, and it is the same unit the set-based models
//! (`shapley`) and the removal effect (`markov`) reason in; the rule models
//! are not favoured by it, since they split credit by touch and position.
//!
//! Everything here is a pure function of the scenario and a seeded random
//! generator, so the same seed gives the same journeys on every machine.

use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::LoadError;

/// Where in a journey a channel's touches tend to fall.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Position {
    /// Skewed to the start: relative time `u = U^2`.
    Early,
    /// Uniform over the journey: `u = U`.
    Anywhere,
    /// Skewed to the end: `u = 1 - (1 - U)^2`.
    Late,
}

impl Position {
    fn draw<R: Rng>(self, rng: &mut R) -> f64 {
        let u: f64 = rng.gen();
        match self {
            Position::Early => u * u,
            Position::Anywhere => u,
            Position::Late => 1.0 - (1.0 - u) * (1.0 - u),
        }
    }
}

/// How users come to see a channel.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Exposure {
    /// Every touch of the random mix is this channel with probability
    /// `weight / sum of mix weights`, whoever the user is.
    Mix {
        /// Relative exposure frequency.
        weight: f64,
    },
    /// Outside the mix: a user gets one touch with probability
    /// `sigmoid(intercept + slope * intent)` (and a second one with
    /// probability `second_touch`), placed in the last `late_window` of the
    /// journey. A positive slope shows it mostly to users who would buy anyway.
    Targeted {
        /// Log-odds of being targeted at intent 0.
        intercept: f64,
        /// Change of those log-odds per unit of intent.
        slope: f64,
        /// Probability of a second touch for a targeted user.
        second_touch: f64,
        /// Fraction of the journey, at its end, where the touches fall.
        late_window: f64,
    },
}

/// One channel of the scenario.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ChannelSpec {
    /// Channel name as written in the events.
    pub name: String,
    /// Known effect: added to the log-odds of converting when the user was
    /// exposed to the channel at least once. 0 means the channel does nothing.
    pub logit_effect: f64,
    /// How users are exposed.
    pub exposure: Exposure,
    /// Where in the journey the channel's mix touches fall.
    pub position: Position,
    /// Probability that a touch is a view rather than a click.
    pub view_share: f64,
    /// Campaign names, drawn uniformly per touch.
    pub campaigns: Vec<String>,
}

/// The whole scenario: channels and the conversion model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Scenario {
    /// Name of the invented business.
    pub name: String,
    /// Log-odds of converting with intent 0 and no effective exposure.
    pub baseline_logit: f64,
    /// Log-odds added per unit of latent intent (intent ~ Normal(0, 1)).
    pub intent_coef: f64,
    /// Mean of the Poisson number of mix touches beyond the first.
    pub extra_touches_mean: f64,
    /// Cap on mix touches per journey.
    pub max_mix_touches: u32,
    /// Shortest journey (first possible touch to last possible touch), ms.
    pub journey_min_ms: i64,
    /// Longest journey, ms.
    pub journey_max_ms: i64,
    /// Shortest delay from the end of the journey to the conversion, ms.
    pub conversion_delay_min_ms: i64,
    /// Longest such delay, ms.
    pub conversion_delay_max_ms: i64,
    /// Order value: log-normal with this mean of the log...
    pub value_log_mean: f64,
    /// ...and this standard deviation of the log.
    pub value_log_sd: f64,
    /// ISO 4217 currency of order values.
    pub currency: String,
    /// Conversion goal name.
    pub goal: String,
    /// The channels (at most 64).
    pub channels: Vec<ChannelSpec>,
}

const HOUR: i64 = 3_600_000;
const DAY: i64 = 24 * HOUR;

/// The contract's default lookback (docs/contract.md, "Journey rules"): a
/// scenario keeps every touch of a journey inside it, so the eligible path of
/// a conversion is always the whole journey and the truth needs no windowing.
pub const DEFAULT_LOOKBACK_MS: i64 = 30 * DAY;

fn channel(
    name: &str,
    logit_effect: f64,
    exposure: Exposure,
    position: Position,
    view_share: f64,
    campaigns: &[&str],
) -> ChannelSpec {
    ChannelSpec {
        name: name.into(),
        logit_effect,
        exposure,
        position,
        view_share,
        campaigns: campaigns.iter().map(|s| s.to_string()).collect(),
    }
}

impl Scenario {
    /// The example trail shop, an invented online shop for outdoor gear.
    ///
    /// Four channels work (`paid_search`, `affiliate`, `email`, `video`), two
    /// are shown often and do nothing (`social`, `display`), and `push` does
    /// nothing but goes mostly to high-intent shoppers near the end of their
    /// journey. All numbers are invented for this simulation.
    pub fn example_shop() -> Scenario {
        use Exposure::Mix;
        use Position::*;
        Scenario {
            name: "Example Trail Shop (invented online outdoor-gear shop)".into(),
            baseline_logit: -3.0,
            intent_coef: 1.0,
            extra_touches_mean: 2.5,
            max_mix_touches: 12,
            journey_min_ms: 2 * HOUR,
            journey_max_ms: 21 * DAY,
            conversion_delay_min_ms: 10 * 60_000,
            conversion_delay_max_ms: 2 * DAY,
            value_log_mean: 4.4,
            value_log_sd: 0.6,
            currency: "USD".into(),
            goal: "purchase".into(),
            channels: vec![
                channel(
                    "paid_search",
                    0.60,
                    Mix { weight: 20.0 },
                    Late,
                    0.0,
                    &["tents-generic", "boots-generic", "brand-terms"],
                ),
                channel("affiliate", 0.90, Mix { weight: 7.0 }, Late, 0.0, &["hiking-blogs", "review-sites"]),
                channel("email", 0.35, Mix { weight: 16.0 }, Anywhere, 0.0, &["newsletter-weekly", "trail-club"]),
                channel("video", 0.20, Mix { weight: 9.0 }, Early, 0.7, &["gear-reviews", "trail-guides"]),
                channel("social", 0.0, Mix { weight: 26.0 }, Early, 0.5, &["summit-stories", "gear-clips"]),
                channel("display", 0.0, Mix { weight: 22.0 }, Early, 1.0, &["camping-season", "new-arrivals"]),
                channel(
                    "push",
                    0.0,
                    Exposure::Targeted { intercept: -2.0, slope: 1.5, second_touch: 0.5, late_window: 0.15 },
                    Late,
                    0.0,
                    &["back-in-stock", "cart-reminder"],
                ),
            ],
        }
    }

    /// Checks that the scenario is well formed and keeps every journey
    /// (touches and conversion) inside the default lookback.
    pub fn validate(&self) -> Result<(), LoadError> {
        let bad = |m: String| Err(LoadError::Scenario(m));
        if self.channels.is_empty() || self.channels.len() > 64 {
            return bad(format!("1..=64 channels needed, got {}", self.channels.len()));
        }
        for (i, c) in self.channels.iter().enumerate() {
            if c.name.is_empty() || self.channels[..i].iter().any(|o| o.name == c.name) {
                return bad(format!("channel name {:?} is empty or repeated", c.name));
            }
            if c.campaigns.is_empty() || c.campaigns.len() > 255 {
                return bad(format!("channel {} needs 1..=255 campaigns", c.name));
            }
            // Plain names need no JSON escaping in the generated lines.
            if !std::iter::once(&c.name).chain(&c.campaigns).all(|s| is_plain(s)) {
                return bad(format!("channel {}: names must be 1..=64 of [A-Za-z0-9_.-]", c.name));
            }
            if !c.logit_effect.is_finite() || !(0.0..=1.0).contains(&c.view_share) {
                return bad(format!("channel {}: effect must be finite, view_share in [0, 1]", c.name));
            }
            match c.exposure {
                Exposure::Mix { weight } if !(weight.is_finite() && weight >= 0.0) => {
                    return bad(format!("channel {}: mix weight must be >= 0", c.name))
                }
                Exposure::Targeted { intercept, slope, second_touch, late_window }
                    if !(intercept.is_finite()
                        && slope.is_finite()
                        && (0.0..=1.0).contains(&second_touch)
                        && late_window > 0.0
                        && late_window <= 1.0) =>
                {
                    return bad(format!("channel {}: targeting parameters out of range", c.name))
                }
                _ => {}
            }
        }
        if self.mix_total() <= 0.0 {
            return bad("the mix needs at least one channel with a positive weight".into());
        }
        if !(self.extra_touches_mean >= 0.0 && self.extra_touches_mean < 50.0) || self.max_mix_touches == 0 {
            return bad("extra_touches_mean must be in [0, 50) and max_mix_touches >= 1".into());
        }
        if !(0 < self.journey_min_ms
            && self.journey_min_ms <= self.journey_max_ms
            && 0 < self.conversion_delay_min_ms
            && self.conversion_delay_min_ms <= self.conversion_delay_max_ms
            && self.journey_max_ms + self.conversion_delay_max_ms <= DEFAULT_LOOKBACK_MS)
        {
            return bad("journey and delay spans must be positive, ordered and fit in the 30-day lookback".into());
        }
        if ![self.baseline_logit, self.intent_coef, self.value_log_mean, self.value_log_sd]
            .iter()
            .all(|x| x.is_finite())
        {
            return bad("model parameters must be finite".into());
        }
        Ok(())
    }

    fn mix_total(&self) -> f64 {
        self.channels
            .iter()
            .map(|c| match c.exposure {
                Exposure::Mix { weight } => weight,
                Exposure::Targeted { .. } => 0.0,
            })
            .sum()
    }

    /// Index of a channel by name.
    pub fn channel_index(&self, name: &str) -> Option<usize> {
        self.channels.iter().position(|c| c.name == name)
    }

    /// Log-odds of converting for a user with `base = baseline + intent_coef * intent`
    /// exposed to the channels in `mask` (bit i = channel i).
    pub fn logit(&self, base: f64, mask: u64) -> f64 {
        base + self
            .channels
            .iter()
            .enumerate()
            .filter(|(i, _)| mask >> i & 1 == 1)
            .map(|(_, c)| c.logit_effect)
            .sum::<f64>()
    }

    /// Draws one journey. Touch offsets are relative to the journey start.
    pub fn journey<R: Rng>(&self, rng: &mut R) -> SimJourney {
        let mix_total = self.mix_total();
        let intent = standard_normal(rng);
        let base = self.baseline_logit + self.intent_coef * intent;
        let length = rng.gen_range(self.journey_min_ms..=self.journey_max_ms);
        let n_mix = (1 + poisson(rng, self.extra_touches_mean)).min(self.max_mix_touches);
        let mut touches: Vec<SimTouch> = Vec::with_capacity(n_mix as usize + 2);
        let mut mask = 0u64;
        for _ in 0..n_mix {
            let mut pick = rng.gen::<f64>() * mix_total;
            let mut ch = 0;
            for (i, c) in self.channels.iter().enumerate() {
                if let Exposure::Mix { weight } = c.exposure {
                    ch = i;
                    if pick < weight {
                        break;
                    }
                    pick -= weight;
                }
            }
            let u = self.channels[ch].position.draw(rng);
            touches.push(self.touch(rng, ch, u, length));
            mask |= 1 << ch;
        }
        for (i, c) in self.channels.iter().enumerate() {
            if let Exposure::Targeted { intercept, slope, second_touch, late_window } = c.exposure {
                if rng.gen::<f64>() < sigmoid(intercept + slope * intent) {
                    let n = if rng.gen::<f64>() < second_touch { 2 } else { 1 };
                    for _ in 0..n {
                        let u = 1.0 - late_window * rng.gen::<f64>();
                        touches.push(self.touch(rng, i, u, length));
                    }
                    mask |= 1 << i;
                }
            }
        }
        // Stable: equal times keep the order of drawing.
        touches.sort_by_key(|t| t.offset_ms);
        let p_convert = sigmoid(self.logit(base, mask));
        let converted = rng.gen::<f64>() < p_convert;
        let (conversion_offset_ms, value_cents) = if converted {
            let delay = rng.gen_range(self.conversion_delay_min_ms..=self.conversion_delay_max_ms);
            let value = (self.value_log_mean + self.value_log_sd * standard_normal(rng)).exp();
            (length + delay, (value * 100.0).round().max(1.0) as u64)
        } else {
            (0, 0)
        };
        SimJourney {
            intent,
            base_logit: base,
            touches,
            exposed: mask,
            p_convert,
            converted,
            conversion_offset_ms,
            value_cents,
        }
    }

    fn touch<R: Rng>(&self, rng: &mut R, ch: usize, u: f64, length: i64) -> SimTouch {
        let c = &self.channels[ch];
        let campaign = rng.gen_range(0..c.campaigns.len()) as u8;
        let view = c.view_share > 0.0 && rng.gen::<f64>() < c.view_share;
        SimTouch { offset_ms: (u.clamp(0.0, 1.0) * length as f64) as i64, channel: ch as u8, campaign, view }
    }
}

/// 1..=64 characters of `[A-Za-z0-9_.-]`.
pub fn is_plain(s: &str) -> bool {
    (1..=64).contains(&s.len()) && s.bytes().all(|b| b.is_ascii_alphanumeric() || b"_.-".contains(&b))
}

/// One touch of a simulated journey.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SimTouch {
    /// Milliseconds after the journey start.
    pub offset_ms: i64,
    /// Channel index in the scenario.
    pub channel: u8,
    /// Campaign index in the channel's list.
    pub campaign: u8,
    /// A view rather than a click.
    pub view: bool,
}

/// One simulated journey.
#[derive(Debug, Clone, PartialEq)]
pub struct SimJourney {
    /// Latent intent, Normal(0, 1).
    pub intent: f64,
    /// `baseline_logit + intent_coef * intent`.
    pub base_logit: f64,
    /// Touches in time order.
    pub touches: Vec<SimTouch>,
    /// Channels the user was exposed to (bit i = channel i).
    pub exposed: u64,
    /// The model's probability of converting.
    pub p_convert: f64,
    /// Whether the user converted.
    pub converted: bool,
    /// Conversion time after the journey start (converting journeys).
    pub conversion_offset_ms: i64,
    /// Order value in cents (converting journeys).
    pub value_cents: u64,
}

/// The logistic function.
pub fn sigmoid(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

/// Normal(0, 1) by the Box-Muller transform.
pub fn standard_normal<R: Rng>(rng: &mut R) -> f64 {
    let u1: f64 = 1.0 - rng.gen::<f64>(); // (0, 1]
    let u2: f64 = rng.gen();
    (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
}

/// Poisson(mean) by multiplying uniforms (Knuth); fine for small means.
pub fn poisson<R: Rng>(rng: &mut R, mean: f64) -> u32 {
    if mean <= 0.0 {
        return 0;
    }
    let limit = (-mean).exp();
    let mut k = 0u32;
    let mut p: f64 = rng.gen();
    while p > limit {
        k += 1;
        p *= rng.gen::<f64>();
    }
    k
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    #[test]
    fn example_shop_is_valid() {
        Scenario::example_shop().validate().unwrap();
    }

    #[test]
    fn validation_rejects_journeys_longer_than_the_lookback() {
        let mut s = Scenario::example_shop();
        s.journey_max_ms = 29 * DAY;
        assert!(s.validate().is_err());
        let mut s = Scenario::example_shop();
        s.channels[1].name = "paid_search".into();
        assert!(s.validate().is_err());
    }

    #[test]
    fn journeys_stay_inside_the_lookback_and_in_time_order() {
        let s = Scenario::example_shop();
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        for _ in 0..5000 {
            let j = s.journey(&mut rng);
            assert!(!j.touches.is_empty());
            assert!(j.touches.windows(2).all(|w| w[0].offset_ms <= w[1].offset_ms));
            let first = j.touches[0].offset_ms;
            if j.converted {
                let last = j.touches.last().unwrap().offset_ms;
                assert!(j.conversion_offset_ms > last);
                assert!(j.conversion_offset_ms - first <= DEFAULT_LOOKBACK_MS);
            }
            let mask = j.touches.iter().fold(0u64, |m, t| m | 1 << t.channel);
            assert_eq!(mask, j.exposed);
        }
    }

    #[test]
    fn sampler_moments() {
        // Mean and variance of Normal(0, 1) and Poisson(2.5) (both are
        // textbook facts: E = 0, Var = 1; E = Var = lambda); 200k draws give
        // standard errors near 0.0022 / 0.0035, so the bounds are > 5 s.e.
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let n = 200_000;
        let xs: Vec<f64> = (0..n).map(|_| standard_normal(&mut rng)).collect();
        let (m, sd) = crate::stats::mean_sd(&xs);
        assert!(m.abs() < 0.012 && (sd - 1.0).abs() < 0.012, "normal {m} {sd}");
        let ks: Vec<f64> = (0..n).map(|_| poisson(&mut rng, 2.5) as f64).collect();
        let (m, sd) = crate::stats::mean_sd(&ks);
        assert!((m - 2.5).abs() < 0.02 && (sd * sd - 2.5).abs() < 0.05, "poisson {m} {}", sd * sd);
    }
}
