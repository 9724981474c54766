//! The models `serve` credits with, and when the data-driven ones are
//! refitted (docs/contract.md, "Models", Fitting): every `refit_interval`,
//! from the path statistics of every open partition. Each refit fits
//! `shapley` and `markov` once; the same fitted models credit conversions
//! and describe themselves on `/v1/models`.

use std::time::Instant;

use apportion_contract::ModelId;
use apportion_engine::datadriven::{MarkovModel, PathStats, ShapleyModel};
use apportion_engine::registry::{rule_model, ModelPlan};
use apportion_engine::Model;

use crate::metrics::Metrics;

/// Seed of the Monte Carlo estimate of global Shapley values (used only
/// above 20 channels; reported with the result).
pub const GLOBAL_SEED: u64 = 20_260_101;

/// The current model snapshot and its refit schedule.
pub struct Refit {
    plan: ModelPlan,
    interval_ms: i64,
    models: Vec<Box<dyn Model>>,
    json: serde_json::Value,
    last_fit: Option<Instant>,
    metrics: Metrics,
}

impl Refit {
    /// The models of `plan`, the data-driven ones fitted on no paths yet.
    pub fn new(plan: ModelPlan, interval_ms: i64, metrics: Metrics) -> Self {
        let empty = plan.empty_stats();
        let (models, json) = fit(&plan, &empty);
        Refit { plan, interval_ms, models, json, last_fit: None, metrics }
    }

    /// The models, in output order.
    pub fn models(&self) -> &[Box<dyn Model>] {
        &self.models
    }

    /// The snapshot for the read-only model endpoint: every model's name and
    /// version, and for the data-driven ones the fitted weights.
    pub fn json(&self) -> &serde_json::Value {
        &self.json
    }

    /// True when the plan has a data-driven model and `refit_interval` has
    /// passed since the last fit (or there was none).
    pub fn due(&self) -> bool {
        self.plan.data_driven() && self.last_fit.is_none_or(|t| t.elapsed().as_millis() as i64 >= self.interval_ms)
    }

    /// Refits the data-driven models on `stats`. Returns true when a
    /// model's version changed.
    pub fn refit(&mut self, stats: &PathStats) -> bool {
        self.last_fit = Some(Instant::now());
        if !self.plan.data_driven() {
            return false;
        }
        let started = Instant::now();
        let before: Vec<Option<String>> = self.models.iter().map(|m| m.version().map(str::to_string)).collect();
        let (models, json) = fit(&self.plan, stats);
        self.models = models;
        self.json = json;
        let secs = started.elapsed().as_secs_f64();
        let now =
            std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs_f64()).unwrap_or(0.0);
        for m in self.plan.ids.iter().filter(|m| m.is_data_driven()) {
            self.metrics.refit_time.with_label_values(&[m.as_str()]).set(now);
            self.metrics.refit_duration.with_label_values(&[m.as_str()]).set(secs);
        }
        tracing::info!(
            paths = stats.paths(),
            conversions = stats.conversions(),
            seconds = secs,
            "refitted data-driven models"
        );
        let after: Vec<Option<String>> = self.models.iter().map(|m| m.version().map(str::to_string)).collect();
        before != after
    }
}

/// Fits the plan's models on `stats` (each data-driven model once) and
/// describes them.
pub fn fit(plan: &ModelPlan, stats: &PathStats) -> (Vec<Box<dyn Model>>, serde_json::Value) {
    let mut shapley = plan.ids.contains(&ModelId::Shapley).then(|| ShapleyModel::fit(stats));
    let mut markov = plan.ids.contains(&ModelId::Markov).then(|| MarkovModel::fit(stats));
    let mut described = Vec::new();
    for id in &plan.ids {
        let mut v = serde_json::json!({ "model": id.as_str() });
        match id {
            ModelId::Shapley => {
                let s = shapley.as_ref().expect("fitted above");
                let g = s.global_values(GLOBAL_SEED);
                v["model_version"] = s.model_version().into();
                v["channels"] = serde_json::to_value(&g.channels).unwrap_or_default();
                v["method"] = serde_json::to_value(g.method).unwrap_or_default();
            }
            ModelId::Markov => {
                let mk = markov.as_ref().expect("fitted above");
                v["model_version"] = mk.model_version().into();
                v["conversion_probability"] = serde_json::json!(mk.conversion_probability());
                v["removal_effects"] = mk
                    .removal_effects()
                    .into_iter()
                    .map(|(c, r)| serde_json::json!({ "channel": c, "removal_effect": r }))
                    .collect();
            }
            _ => v["model_version"] = serde_json::Value::Null,
        }
        described.push(v);
    }
    let models = plan
        .ids
        .iter()
        .map(|&id| match id {
            ModelId::Shapley => Box::new(shapley.take().expect("fitted above")) as Box<dyn Model>,
            ModelId::Markov => Box::new(markov.take().expect("fitted above")),
            rule => rule_model(rule, &plan.params).expect("a rule model"),
        })
        .collect();
    let json = serde_json::json!({ "paths": stats.paths(), "conversions": stats.conversions(), "models": described });
    (models, json)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The snapshot's description names the versions of the models that
    /// credit (one fit, not two that could differ).
    #[test]
    fn description_matches_the_fitted_models() {
        let plan = ModelPlan { ids: vec![ModelId::Linear, ModelId::Shapley, ModelId::Markov], ..ModelPlan::rules() };
        let mut stats = PathStats::new(1);
        stats.add_path(&["email", "seo"], true);
        stats.add_path(&["seo"], false);
        let (models, json) = fit(&plan, &stats);
        for (m, d) in models.iter().zip(json["models"].as_array().unwrap()) {
            assert_eq!(d["model"], m.id().as_str());
            assert_eq!(d["model_version"].as_str(), m.version());
        }
        assert_eq!(json["paths"], 2);
    }
}
