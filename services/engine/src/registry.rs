//! Builds models from their names and parameters.

use crate::model::{FirstTouch, LastTouch, Linear, Model, TimeDecay, UShaped, DATA_DRIVEN_MODELS, RULE_MODELS};

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

/// A model name that is not known, or parameters out of range.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum ModelError {
    /// Unknown model name.
    #[error("unknown model {0:?}: expected one of last_touch, first_touch, linear, time_decay, u_shaped, shapley, markov")]
    Unknown(String),
    /// A model listed twice.
    #[error("model {0:?} is listed twice")]
    Duplicate(String),
    /// No model listed.
    #[error("no model listed")]
    Empty,
    /// Bad parameter.
    #[error("{0}")]
    Param(String),
}

/// Parses a comma-separated model list, checking names and duplicates.
pub fn parse_model_list(list: &str) -> Result<Vec<String>, ModelError> {
    let mut out: Vec<String> = Vec::new();
    for name in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        if !RULE_MODELS.contains(&name) && !DATA_DRIVEN_MODELS.contains(&name) {
            return Err(ModelError::Unknown(name.to_string()));
        }
        if out.iter().any(|n| n == name) {
            return Err(ModelError::Duplicate(name.to_string()));
        }
        out.push(name.to_string());
    }
    if out.is_empty() {
        return Err(ModelError::Empty);
    }
    Ok(out)
}

/// Checks rule parameters.
pub fn check_params(p: &RuleParams) -> Result<(), ModelError> {
    if p.half_life_ms <= 0 {
        return Err(ModelError::Param("time_decay half-life must be greater than 0".into()));
    }
    let ok = |w: f64| w.is_finite() && (0.0..=1.0).contains(&w);
    if !ok(p.u_first) || !ok(p.u_last) || p.u_first + p.u_last > 1.0 + 1e-12 {
        return Err(ModelError::Param(format!(
            "u_shaped endpoint weights must be in [0, 1] and sum to at most 1, got first {} and last {}",
            p.u_first, p.u_last
        )));
    }
    Ok(())
}

/// Builds one rule model by name (`None` for data-driven or unknown names).
pub fn rule_model(name: &str, p: &RuleParams) -> Option<Box<dyn Model>> {
    Some(match name {
        "last_touch" => Box::new(LastTouch),
        "first_touch" => Box::new(FirstTouch),
        "linear" => Box::new(Linear),
        "time_decay" => Box::new(TimeDecay { half_life_ms: p.half_life_ms }),
        "u_shaped" => Box::new(UShaped { first: p.u_first, last: p.u_last }),
        _ => return None,
    })
}
