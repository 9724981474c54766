//! The replay driver: fit the data-driven models on every closed path of
//! the input (a first pass), then credit every conversion with that one fit
//! (a second pass) (docs/contract.md, "Models", Fitting). Without a
//! data-driven model there is only the credit pass.
//!
//! The driver owns the order of the steps and nothing else: the caller
//! supplies the events of a pass (already deduplicated and sorted in path
//! order, every pass the same), a store per pass, and what to do with each
//! effect. `apportion replay` feeds it events read back from an indexed
//! file with a sled store; [`super::replay_lines`] feeds it in-memory lines
//! with a [`MemStore`](crate::MemStore).

use crate::datadriven::PathStats;
use crate::journey::Rules;
use crate::model::Model;
use crate::processor::{Effect, JourneyEvent, JourneyStore};
use crate::registry::ModelPlan;

use super::Replayer;

/// Which pass is running.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Pass {
    /// Collecting closed paths to fit the data-driven models.
    Fit,
    /// Crediting conversions.
    Credit,
}

impl Pass {
    /// A short name (`fit`, `credit`), e.g. for a store partition or a
    /// progress line.
    pub fn name(self) -> &'static str {
        match self {
            Pass::Fit => "fit",
            Pass::Credit => "credit",
        }
    }
}

/// Runs one pass: applies every event `events` hands over, then closes
/// every journey; hands each effect to `emit`. Returns the number of events
/// applied.
pub fn apply_pass<S, E, P, F>(rules: Rules, store: S, events: P, mut emit: F) -> Result<u64, E>
where
    S: JourneyStore,
    E: From<S::Error>,
    P: FnOnce(&mut dyn FnMut(JourneyEvent) -> Result<(), E>) -> Result<(), E>,
    F: FnMut(&Effect) -> Result<(), E>,
{
    let mut replayer = Replayer::new(rules, store);
    let mut applied = 0u64;
    events(&mut |ev| {
        applied += 1;
        for e in replayer.push(ev)? {
            emit(&e)?;
        }
        Ok(())
    })?;
    for e in replayer.finish()? {
        emit(&e)?;
    }
    Ok(applied)
}

/// The fit pass: the path statistics of every closed path, counted into
/// `empty` (the plan's [`ModelPlan::empty_stats`]: its Markov order and
/// channel cap).
pub fn fit<S, E, P>(rules: Rules, empty: PathStats, store: S, events: P) -> Result<PathStats, E>
where
    S: JourneyStore,
    E: From<S::Error>,
    P: FnOnce(&mut dyn FnMut(JourneyEvent) -> Result<(), E>) -> Result<(), E>,
{
    let mut stats = empty;
    apply_pass(rules, store, events, |e| {
        add_closed_path(&mut stats, e);
        Ok(())
    })?;
    Ok(stats)
}

/// Adds the closed path of an effect, if it makes one, to `stats`.
pub fn add_closed_path(stats: &mut PathStats, effect: &Effect) {
    if let Effect::Journey { outcome, .. } = effect {
        if let Some((converted, path)) = outcome.closed_path() {
            let chans: Vec<&str> = path.iter().map(|t| t.channel.as_str()).collect();
            stats.add_path(&chans, converted);
        }
    }
}

/// What [`run`] did.
pub struct Replayed {
    /// The models the credit pass used (fitted when data-driven).
    pub models: Vec<Box<dyn Model>>,
    /// The statistics of the fit pass, when there was one.
    pub stats: Option<PathStats>,
    /// Events applied by the credit pass.
    pub events: u64,
}

/// Fits (when the plan has a data-driven model), then credits. `store` and
/// `events` are called once per pass; `emit` gets every effect of the
/// credit pass with the models to credit it with.
pub fn run<S, E, St, Ev, F>(
    plan: &ModelPlan,
    rules: Rules,
    mut store: St,
    mut events: Ev,
    mut emit: F,
) -> Result<Replayed, E>
where
    S: JourneyStore,
    E: From<S::Error>,
    St: FnMut(Pass) -> Result<S, E>,
    Ev: FnMut(Pass, &mut dyn FnMut(JourneyEvent) -> Result<(), E>) -> Result<(), E>,
    F: FnMut(&Effect, &[Box<dyn Model>]) -> Result<(), E>,
{
    let stats = if plan.data_driven() {
        Some(fit(rules, plan.empty_stats(), store(Pass::Fit)?, |cb| events(Pass::Fit, cb))?)
    } else {
        None
    };
    let models = plan.build(stats.as_ref());
    let events = apply_pass(rules, store(Pass::Credit)?, |cb| events(Pass::Credit, cb), |e| emit(e, &models))?;
    Ok(Replayed { models, stats, events })
}
