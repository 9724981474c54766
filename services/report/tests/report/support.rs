//! Shared helpers: a simulated run of the ground-truth scenario credited in
//! process by the engine's replay, as this crate's rows.

use apportion_engine::replay::{replay_lines, ReplayResult};
use apportion_engine::{ModelId, ModelPlan, Pseudonymizer, Rules};
use apportion_load::groundtruth::LOAD_PSEUDONYM_KEY;
use apportion_load::scenario::Scenario;
use apportion_load::simulate::{simulate, SimOptions, Truth};
use apportion_report::{CreditRecord, PathRecord};

/// A simulated run: the truth, the engine's rows, and the same credit rows
/// as this crate reads them.
pub struct Sim {
    pub opts: SimOptions,
    pub truth: Truth,
    pub replay: ReplayResult,
    pub credit: Vec<CreditRecord>,
}

/// Simulates `users` users of the ground-truth scenario and credits them
/// under all seven models (two passes: shapley and markov fit on every
/// closed path first, as `apportion replay` does).
pub fn simulated(users: u64, seed: u64) -> Sim {
    let opts = SimOptions::new(users, seed);
    let mut buf = Vec::new();
    let truth = simulate(&Scenario::example_shop(), &opts, &mut buf).unwrap();
    let text = String::from_utf8(buf).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let pseudo = Pseudonymizer::new(LOAD_PSEUDONYM_KEY.as_bytes());
    let all = ModelPlan { ids: ModelId::ALL.to_vec(), ..ModelPlan::rules() };
    let replay = replay_lines(&lines, Rules::default(), &pseudo, &all);
    let credit = replay.rows.iter().map(|r| CreditRecord::from_serialized(r).unwrap()).collect();
    Sim { opts, truth, replay, credit }
}

/// Writes rows as NDJSON lines.
pub fn ndjson<T: serde::Serialize>(rows: &[T]) -> String {
    rows.iter().map(|r| serde_json::to_string(r).unwrap() + "\n").collect()
}

/// Only the closed paths of a simulation (no model runs: paths do not
/// depend on the models).
pub fn simulated_paths(users: u64, seed: u64) -> (Truth, Vec<PathRecord>) {
    let mut buf = Vec::new();
    let truth = simulate(&Scenario::example_shop(), &SimOptions::new(users, seed), &mut buf).unwrap();
    let text = String::from_utf8(buf).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let pseudo = Pseudonymizer::new(LOAD_PSEUDONYM_KEY.as_bytes());
    let no_models = ModelPlan { ids: Vec::new(), ..ModelPlan::rules() };
    let replay = replay_lines(&lines, Rules::default(), &pseudo, &no_models);
    let paths =
        replay.paths.iter().map(|p| PathRecord::from_json(&serde_json::to_string(p).unwrap()).unwrap()).collect();
    (truth, paths)
}
