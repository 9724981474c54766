//! The models `serve` credits with, and when the data-driven ones are
//! refitted (docs/contract.md, "Models", Fitting).
//!
//! A [`Snapshot`] is the set of configured models, the data-driven ones
//! fitted on one value of the path statistics; its version is the
//! statistics' fingerprint, so equal statistics give equal snapshots (and
//! the same `model_version`s). Every `refit_interval` a new snapshot is
//! fitted on the statistics of every open partition. Partitions adopt it at
//! their next commit, in the same atomic batch as their offsets, and the
//! store keeps the statistics of every snapshot a partition names: a
//! partition reopened after a crash credits with the snapshot it had, so a
//! redelivered batch gets the data-driven credit it got the first time.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Instant;

use anyhow::Result;
use apportion_contract::ModelId;
use apportion_engine::datadriven::{MarkovModel, PathStats, ShapleyModel};
use apportion_engine::registry::{rule_model, ModelPlan};
use apportion_engine::Model;
use apportion_store::Store;

use crate::metrics::Metrics;

/// Seed of the Monte Carlo estimate of global Shapley values (used only
/// above 20 channels; reported with the result).
pub const GLOBAL_SEED: u64 = 20_260_101;

/// The configured models, the data-driven ones fitted on one value of the
/// path statistics.
pub struct Snapshot {
    version: Option<String>,
    models: Vec<Box<dyn Model>>,
    json: serde_json::Value,
}

impl Snapshot {
    /// Fits the plan's models on `stats`.
    pub fn fit(plan: &ModelPlan, stats: &PathStats) -> Snapshot {
        let (models, json) = fit(plan, stats);
        Snapshot { version: Snapshot::version_of(plan, stats), models, json }
    }

    /// The version a fit of `plan` on `stats` would have (`None` without
    /// data-driven models), without fitting.
    pub fn version_of(plan: &ModelPlan, stats: &PathStats) -> Option<String> {
        plan.data_driven().then(|| format!("o{}-{}", stats.markov_order(), stats.fingerprint()))
    }

    /// The snapshot's key in the store (`None` without data-driven models).
    pub fn version(&self) -> Option<&str> {
        self.version.as_deref()
    }

    /// The models, in output order.
    pub fn models(&self) -> &[Box<dyn Model>] {
        &self.models
    }

    /// The description for `/v1/models`.
    pub fn json(&self) -> &serde_json::Value {
        &self.json
    }
}

/// The current snapshot, the snapshots partitions still credit with, and
/// the refit schedule.
pub struct Refit {
    plan: ModelPlan,
    interval_ms: i64,
    current: Arc<Snapshot>,
    loaded: HashMap<String, Arc<Snapshot>>,
    /// The versions fitted last, newest at the back (at most
    /// [`KEEP_RECENT`]): their statistics stay in the store.
    recent: std::collections::VecDeque<String>,
    last_fit: Option<Instant>,
    metrics: Metrics,
}

/// How many of the snapshots fitted last keep their statistics in the
/// store although no partition here credits with them: a partition that
/// moves here from another instance names the snapshot it committed with
/// there, which this instance fitted too when both fitted the same round
/// (shared statistics) but had already moved past when the partition
/// arrived (a session timeout and a restore later: with 1 s rounds, tens of
/// rounds).
pub const KEEP_RECENT: usize = 64;

impl Refit {
    /// The models of `plan`, the data-driven ones fitted on no paths yet.
    pub fn new(plan: ModelPlan, interval_ms: i64, metrics: Metrics) -> Self {
        let current = Arc::new(Snapshot::fit(&plan, &plan.empty_stats()));
        Refit {
            plan,
            interval_ms,
            current,
            loaded: HashMap::new(),
            recent: Default::default(),
            last_fit: None,
            metrics,
        }
    }

    /// The current snapshot.
    pub fn current(&self) -> &Arc<Snapshot> {
        &self.current
    }

    /// The snapshot a partition committed with (`version`), from the store;
    /// the current one for a partition without one. A named snapshot the
    /// store lacks is an error: crediting with another would change the
    /// credit of a redelivered batch.
    /// `held` offers statistics that may give a snapshot the store lacks
    /// (the rounds of shared statistics held in full): one whose fit has
    /// the named version is stored and used.
    pub fn snapshot_for(
        &mut self,
        store: &Store,
        version: Option<&str>,
        held: impl FnOnce() -> Vec<PathStats>,
    ) -> Result<Arc<Snapshot>> {
        let Some(v) = version.filter(|_| self.plan.data_driven()) else { return Ok(self.current.clone()) };
        if self.current.version() == Some(v) {
            return Ok(self.current.clone());
        }
        if let Some(s) = self.loaded.get(v) {
            return Ok(s.clone());
        }
        let empty = self.plan.empty_stats();
        // The fit on no paths yet (what every instance starts with).
        let stored = match Snapshot::version_of(&self.plan, &empty).as_deref() == Some(v) {
            true => Some(empty),
            false => store.snapshot(v, self.plan.markov_order)?,
        };
        let stored = match stored {
            Some(stats) => Some(stats),
            None => {
                match held().into_iter().find(|stats| Snapshot::version_of(&self.plan, stats).as_deref() == Some(v)) {
                    Some(stats) => {
                        tracing::info!(snapshot = v, "a partition names a model snapshot this store did not hold; fitted again from the shared path statistics of its round");
                        store.save_snapshot(v, &stats)?;
                        Some(stats)
                    }
                    None => None,
                }
            }
        };
        let Some(stats) = stored else {
            // A partition restored from its changelog names the snapshot
            // of the instance that owned it before; the snapshots are local.
            tracing::warn!(
                snapshot = v,
                current = ?self.current.version(),
                "a partition names a model snapshot this store does not hold (restored from a changelog written by another instance, or a damaged data dir); it credits with the current snapshot from now on"
            );
            return Ok(self.current.clone());
        };
        // The cap is not in the stored form; it decides how a channel
        // never seen is credited (with the bucket or not), so it is put back.
        let stats = stats.with_max_channels(self.plan.max_channels);
        let s = Arc::new(Snapshot::fit(&self.plan, &stats));
        self.loaded.insert(v.to_string(), s.clone());
        Ok(s)
    }

    /// True when the plan has a data-driven model and `refit_interval` has
    /// passed since the last fit (or there was none).
    pub fn due(&self) -> bool {
        self.plan.data_driven() && self.last_fit.is_none_or(|t| t.elapsed().as_millis() as i64 >= self.interval_ms)
    }

    /// Fits a new snapshot on `stats` and stores its statistics. Returns it
    /// when its version differs from the current one.
    pub fn refit(&mut self, store: &Store, stats: &PathStats) -> Result<Option<Arc<Snapshot>>> {
        self.last_fit = Some(Instant::now());
        if !self.plan.data_driven() {
            return Ok(None);
        }
        let started = Instant::now();
        let s = Snapshot::fit(&self.plan, stats);
        let secs = started.elapsed().as_secs_f64();
        let now =
            std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs_f64()).unwrap_or(0.0);
        for m in self.plan.ids.iter().filter(|m| m.is_data_driven()) {
            self.metrics.refit_time.with_label_values(&[m.as_str()]).set(now);
            self.metrics.refit_duration.with_label_values(&[m.as_str()]).set(secs);
        }
        if s.version() == self.current.version() {
            return Ok(None);
        }
        tracing::info!(
            paths = stats.paths(),
            conversions = stats.conversions(),
            seconds = secs,
            "refitted data-driven models"
        );
        let version = s.version().expect("data-driven").to_string();
        store.save_snapshot(&version, stats)?;
        self.recent.push_back(version);
        if self.recent.len() > KEEP_RECENT {
            self.recent.pop_front();
        }
        self.current = Arc::new(s);
        Ok(Some(self.current.clone()))
    }

    /// Forgets loaded snapshots no partition uses and deletes their stored
    /// statistics, except those of the [`KEEP_RECENT`] fitted last (kept
    /// while the process runs).
    pub fn prune(&mut self, store: &Store, in_use: &[&str]) -> Result<()> {
        if !self.plan.data_driven() {
            return Ok(());
        }
        self.loaded.retain(|v, _| in_use.contains(&v.as_str()));
        let mut keep: Vec<&str> = in_use.to_vec();
        keep.extend(self.recent.iter().map(String::as_str));
        if let Some(v) = self.current.version() {
            keep.push(v);
        }
        store.prune_snapshots(&keep)?;
        Ok(())
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

    /// A snapshot fitted lately keeps its statistics in the store although
    /// no partition uses it (a partition that moves here may name it), up
    /// to KEEP_RECENT of them; an older one goes. Derived by hand from the
    /// rule in Refit::prune.
    #[test]
    fn pruning_keeps_the_snapshots_fitted_last() {
        let plan = ModelPlan { ids: vec![ModelId::Shapley], ..ModelPlan::rules() };
        let store = Store::temporary().unwrap();
        let mut refit = Refit::new(plan, 0, Metrics::new(prometheus::Registry::new()));
        let mut versions = Vec::new();
        for n in 1..=KEEP_RECENT + 1 {
            let mut stats = PathStats::new(1);
            for _ in 0..n {
                stats.add_path(&["email"], true);
            }
            let s = refit.refit(&store, &stats).unwrap().expect("new statistics, new version");
            versions.push(s.version().unwrap().to_string());
        }
        refit.prune(&store, &[]).unwrap();
        assert!(store.snapshot(&versions[0], 1).unwrap().is_none(), "the oldest went");
        for v in &versions[1..] {
            assert!(store.snapshot(v, 1).unwrap().is_some(), "{v} kept");
        }
    }

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
