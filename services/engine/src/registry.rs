//! The one place that turns model names into models: every caller
//! (`replay`, `serve`, `explain`, the demo, the tests) builds its models here.

use apportion_contract::ModelId;

use crate::datadriven::{MarkovModel, PathStats, ShapleyModel};
use crate::model::{FirstTouch, LastTouch, Linear, Model, TimeDecay, UShaped};

/// Parameters of the rule models.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RuleParams {
    /// `time_decay` half-life, ms.
    pub half_life_ms: i64,
    /// `u_shaped` first-touch weight.
    pub u_first: f64,
    /// `u_shaped` last-touch weight.
    pub u_last: f64,
}

impl Default for RuleParams {
    fn default() -> Self {
        RuleParams { half_life_ms: 7 * 86_400_000, u_first: 0.4, u_last: 0.4 }
    }
}

/// Rule parameters out of range.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{0}")]
pub struct ParamError(pub String);

/// Checks rule parameters.
pub fn check_params(p: &RuleParams) -> Result<(), ParamError> {
    if p.half_life_ms <= 0 {
        return Err(ParamError("time_decay half-life must be greater than 0".into()));
    }
    let ok = |w: f64| w.is_finite() && (0.0..=1.0).contains(&w);
    if !ok(p.u_first) || !ok(p.u_last) || p.u_first + p.u_last > 1.0 + 1e-12 {
        return Err(ParamError(format!(
            "u_shaped endpoint weights must be in [0, 1] and sum to at most 1, got first {} and last {}",
            p.u_first, p.u_last
        )));
    }
    Ok(())
}

/// Builds one rule model (`None` for the data-driven ones, which need path
/// statistics: see [`build`]).
pub fn rule_model(id: ModelId, p: &RuleParams) -> Option<Box<dyn Model>> {
    Some(match id {
        ModelId::LastTouch => Box::new(LastTouch),
        ModelId::FirstTouch => Box::new(FirstTouch),
        ModelId::Linear => Box::new(Linear),
        ModelId::TimeDecay => Box::new(TimeDecay { half_life_ms: p.half_life_ms }),
        ModelId::UShaped => Box::new(UShaped { first: p.u_first, last: p.u_last }),
        ModelId::Shapley | ModelId::Markov => return None,
    })
}

/// Which models to run and with what parameters: everything needed to
/// build them, with or without path statistics.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelPlan {
    /// Models, in output order.
    pub ids: Vec<ModelId>,
    /// Rule-model parameters.
    pub params: RuleParams,
    /// Order of the `markov` chain (1..=4).
    pub markov_order: usize,
    /// Channel cap of the path statistics (`None`: no cap; see
    /// [`PathStats::with_max_channels`]).
    pub max_channels: Option<usize>,
}

impl ModelPlan {
    /// The five rule models with default parameters.
    pub fn rules() -> Self {
        ModelPlan {
            ids: ModelId::RULES.to_vec(),
            params: RuleParams::default(),
            markov_order: 1,
            max_channels: Some(crate::datadriven::DEFAULT_MAX_CHANNELS),
        }
    }

    /// True when a model of the plan is fitted on path statistics.
    pub fn data_driven(&self) -> bool {
        self.ids.iter().any(|m| m.is_data_driven())
    }

    /// Empty statistics of the plan's Markov order and channel cap.
    pub fn empty_stats(&self) -> PathStats {
        PathStats::new(self.markov_order).with_max_channels(self.max_channels)
    }

    /// The models, in order. The data-driven ones are fitted on `stats`;
    /// without statistics they are fitted on none (and then credit every
    /// conversion with their linear fallback).
    pub fn build(&self, stats: Option<&PathStats>) -> Vec<Box<dyn Model>> {
        let empty;
        let stats = match stats {
            Some(s) => s,
            None => {
                empty = self.empty_stats();
                &empty
            }
        };
        self.ids
            .iter()
            .map(|&id| match id {
                ModelId::Shapley => Box::new(ShapleyModel::fit(stats)) as Box<dyn Model>,
                ModelId::Markov => Box::new(MarkovModel::fit(stats)),
                rule => rule_model(rule, &self.params).expect("a rule model"),
            })
            .collect()
    }
}
