//! Attribution models (docs/contract.md, "Models").
//!
//! A [`Model`] turns an eligible path (non-empty, in time order) and the
//! conversion time into one non-negative fraction per touch, summing to 1.
//! The rule models live here; the data-driven ones (`shapley`, `markov`) are
//! fitted from path statistics in [`crate::datadriven`] and implement the same
//! trait, so the credit writer treats every model alike.

use apportion_contract::ModelId;

use crate::journey::Touch;

/// An attribution model.
pub trait Model: Send + Sync {
    /// Which model of the contract this is.
    fn id(&self) -> ModelId;

    /// Snapshot id for fitted models; `None` for rule models.
    fn version(&self) -> Option<&str> {
        None
    }

    /// One fraction per touch of `path` (which is never empty), each >= 0,
    /// summing to 1 within 1e-9.
    fn credit(&self, path: &[Touch], conversion_ts: i64) -> Vec<f64>;
}

/// `last_touch`: everything to the last touch.
#[derive(Debug, Clone, Copy, Default)]
pub struct LastTouch;

impl Model for LastTouch {
    fn id(&self) -> ModelId {
        ModelId::LastTouch
    }
    fn credit(&self, path: &[Touch], _t: i64) -> Vec<f64> {
        let mut w = vec![0.0; path.len()];
        if let Some(last) = w.last_mut() {
            *last = 1.0;
        }
        w
    }
}

/// `first_touch`: everything to the first touch.
#[derive(Debug, Clone, Copy, Default)]
pub struct FirstTouch;

impl Model for FirstTouch {
    fn id(&self) -> ModelId {
        ModelId::FirstTouch
    }
    fn credit(&self, path: &[Touch], _t: i64) -> Vec<f64> {
        let mut w = vec![0.0; path.len()];
        if let Some(first) = w.first_mut() {
            *first = 1.0;
        }
        w
    }
}

/// `linear`: 1/n to each of n touches.
#[derive(Debug, Clone, Copy, Default)]
pub struct Linear;

impl Model for Linear {
    fn id(&self) -> ModelId {
        ModelId::Linear
    }
    fn credit(&self, path: &[Touch], _t: i64) -> Vec<f64> {
        let n = path.len();
        vec![1.0 / n as f64; n]
    }
}

/// `time_decay`: weight `2^(-(T - t_i) / half_life)`, normalized.
#[derive(Debug, Clone, Copy)]
pub struct TimeDecay {
    /// Half-life in milliseconds (> 0).
    pub half_life_ms: i64,
}

impl Model for TimeDecay {
    fn id(&self) -> ModelId {
        ModelId::TimeDecay
    }
    fn credit(&self, path: &[Touch], conversion_ts: i64) -> Vec<f64> {
        // Normalizing cancels any common factor, so weigh relative to the
        // most recent touch: identical fractions, no underflow for old paths.
        let newest = path.iter().map(|t| t.ts).max().unwrap_or(conversion_ts);
        let h = self.half_life_ms.max(1) as f64;
        let raw: Vec<f64> = path.iter().map(|t| (-((newest - t.ts) as f64) / h).exp2()).collect();
        normalize(raw)
    }
}

/// `u_shaped` (position-based): endpoints get fixed weights, the middle
/// touches share the rest evenly.
#[derive(Debug, Clone, Copy)]
pub struct UShaped {
    /// Weight of the first touch when n >= 3 (default 0.4).
    pub first: f64,
    /// Weight of the last touch when n >= 3 (default 0.4).
    pub last: f64,
}

impl Default for UShaped {
    fn default() -> Self {
        UShaped { first: 0.4, last: 0.4 }
    }
}

impl Model for UShaped {
    fn id(&self) -> ModelId {
        ModelId::UShaped
    }
    fn credit(&self, path: &[Touch], _t: i64) -> Vec<f64> {
        let n = path.len();
        match n {
            0 => vec![],
            1 => vec![1.0],
            2 => vec![0.5, 0.5],
            _ => {
                let middle = (1.0 - self.first - self.last) / (n - 2) as f64;
                let mut w = vec![middle; n];
                w[0] = self.first;
                w[n - 1] = self.last;
                w
            }
        }
    }
}

/// Scales non-negative weights to sum to 1 (equal shares if they sum to 0).
pub fn normalize(mut w: Vec<f64>) -> Vec<f64> {
    let sum: f64 = w.iter().sum();
    if sum > 0.0 && sum.is_finite() {
        for x in &mut w {
            *x /= sum;
        }
    } else {
        let n = w.len() as f64;
        for x in &mut w {
            *x = 1.0 / n;
        }
    }
    w
}

/// Spreads per-channel shares over a path: each touch gets its channel's
/// share divided by the number of touches of that channel in the path.
pub fn split_by_channel(path: &[Touch], share: impl Fn(&str) -> f64) -> Vec<f64> {
    let mut counts: std::collections::HashMap<&str, usize> = std::collections::HashMap::new();
    for t in path {
        *counts.entry(t.channel.as_str()).or_default() += 1;
    }
    path.iter().map(|t| share(&t.channel) / counts[t.channel.as_str()] as f64).collect()
}

/// Distinct channels of a path in order of first appearance.
pub fn distinct_channels(path: &[Touch]) -> Vec<&str> {
    let mut set = std::collections::HashSet::with_capacity(path.len());
    path.iter().map(|t| t.channel.as_str()).filter(|c| set.insert(*c)).collect()
}
