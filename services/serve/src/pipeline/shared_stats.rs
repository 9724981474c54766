//! Path statistics shared by the instances of a consumer group, so that
//! every instance fits its data-driven models on the statistics of every
//! input partition, not only on those of the partitions it owns
//! (docs/contract.md, "Models", Fitting across instances).
//!
//! Time is cut into refit rounds: round `r` is the `refit_interval` of wall
//! clock time starting at `r * refit_interval` since the Unix epoch, the
//! same rounds on every instance. In a round each instance publishes the
//! statistics of each partition it has open (once per partition and round,
//! unless a value for that round is already there, e.g. from the
//! partition's previous owner), and reads everything published. The round's
//! fit waits until a round-`r` value of every input partition is in, then
//! merges exactly those values in partition order: every instance merges
//! the same values, so all fit the same snapshot and stamp the same
//! `model_version`. When some partition's value does not come within the
//! wait (its owner is down, a rebalance moved it between two publications),
//! the fit goes ahead with this instance's own statistics of the partition
//! if it has it open, else with the partition's latest older value; that
//! fit can differ between instances until the next round.

use std::collections::BTreeMap;
use std::time::{Duration, Instant};

use anyhow::Result;
use apportion_engine::datadriven::PathStats;

use crate::source::PartId;

/// The shortest round (ms): a shorter `refit_interval` gives rounds of this
/// length when statistics are shared (each round publishes and flushes).
pub const MIN_ROUND_MS: i64 = 1000;

/// One partition's statistics as published for a round.
#[derive(Debug, Clone)]
pub struct Published {
    /// The input partition.
    pub part: PartId,
    /// The refit round.
    pub round: i64,
    /// Its statistics when published.
    pub stats: PathStats,
}

/// Where the instances of a group publish and read partition statistics
/// (a compacted Kafka topic; an in-memory one in tests).
pub trait StatsExchange: Send {
    /// Every input partition of the group (the rounds wait for each).
    fn partitions(&mut self) -> Result<Vec<PartId>>;
    /// Publishes these partitions' statistics for `round`.
    fn publish(&mut self, round: i64, parts: &[(&PartId, &PathStats)]) -> Result<()>;
    /// What was published (by any instance, this one included) since the
    /// last call, in publication order; never waits.
    fn receive(&mut self) -> Result<Vec<Published>>;
}

/// How one round's fit came about.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RoundFit {
    /// The round.
    pub round: i64,
    /// Partitions without a value for the round: their statistics came
    /// from this instance or from an older round (0: every instance that
    /// fits this round fits the same statistics).
    pub missing: usize,
}

/// The rounds of one instance: what it published, what it read, which
/// round it fitted last.
pub struct Rounds {
    exchange: Box<dyn StatsExchange>,
    interval_ms: i64,
    wait: Duration,
    received: BTreeMap<PartId, BTreeMap<i64, PathStats>>,
    published: BTreeMap<PartId, i64>,
    fitted: Option<i64>,
    /// The round in progress and when this instance entered it.
    current: Option<(i64, Instant)>,
    partitions: Vec<PartId>,
}

impl Rounds {
    /// Rounds of `interval_ms`; a round's fit waits up to `wait` (from when
    /// this instance entered the round) for every partition's value.
    pub fn new(exchange: Box<dyn StatsExchange>, interval_ms: i64, wait: Duration) -> Self {
        Rounds {
            exchange,
            interval_ms: interval_ms.max(1),
            wait,
            received: BTreeMap::new(),
            published: BTreeMap::new(),
            fitted: None,
            current: None,
            partitions: Vec::new(),
        }
    }

    /// The wait of a round of `interval_ms`: half of it, at most 30 s.
    pub fn default_wait(interval_ms: i64) -> Duration {
        Duration::from_millis((interval_ms.max(0) as u64 / 2).min(30_000))
    }

    /// One step at wall-clock time `now_ms` (`now` the same moment on the
    /// monotonic clock), with the statistics of the partitions open here
    /// (`open`, in partition order). Publishes what this round lacks of
    /// them, reads what came, and returns the statistics to fit on (merged
    /// into `base`, which carries the configured order and channel cap)
    /// once the round's values are all in or its wait is over; `None`
    /// while waiting, and after the round's fit.
    pub fn step(
        &mut self,
        now_ms: i64,
        now: Instant,
        open: &[(&PartId, &PathStats)],
        base: PathStats,
    ) -> Result<Option<(PathStats, RoundFit)>> {
        let round = now_ms.div_euclid(self.interval_ms);
        if self.current.is_none_or(|(r, _)| r != round) {
            self.current = Some((round, now));
            // Input partitions can be added to a topic: asked once a round.
            match self.exchange.partitions() {
                Ok(p) => self.partitions = p,
                Err(e) => {
                    tracing::warn!(error = %format!("{e:#}"), "cannot list the input partitions for this refit round; using the last list")
                }
            }
        }
        let entered = self.current.map(|(_, t)| t).unwrap_or(now);
        self.read()?;
        // Older rounds are only a fallback: the latest two are enough.
        for rounds in self.received.values_mut() {
            while rounds.len() > 2 && rounds.keys().next().is_some_and(|&r| r < round) {
                rounds.pop_first();
            }
        }
        if self.fitted == Some(round) {
            return Ok(None);
        }
        let due: Vec<(&PartId, &PathStats)> = open
            .iter()
            .filter(|(id, _)| self.published.get(*id) != Some(&round))
            .filter(|(id, _)| !self.received.get(*id).is_some_and(|r| r.contains_key(&round)))
            .copied()
            .collect();
        if !due.is_empty() {
            // A failed publication is not retried in this round: the round
            // then waits its time and fits on what it has (see below).
            match self.exchange.publish(round, &due) {
                // What it published is what the others read (unless a
                // later value for the round replaces it, as it would here).
                Ok(()) => {
                    for (id, s) in &due {
                        self.received.entry((*id).clone()).or_default().insert(round, (*s).clone());
                    }
                }
                Err(e) => {
                    tracing::warn!(error = %format!("{e:#}"), partitions = due.len(), "cannot publish path statistics for this refit round")
                }
            }
            for (id, _) in due {
                self.published.insert(id.clone(), round);
            }
        }
        let all = with_partitions(&self.partitions, open.iter().map(|(id, _)| *id));
        let has_round = |id: &PartId| self.received.get(id).is_some_and(|r| r.contains_key(&round));
        let missing = all.iter().filter(|id| !has_round(id)).count();
        if missing > 0 && now.duration_since(entered) < self.wait {
            return Ok(None);
        }
        let mut merged = base;
        for id in all {
            let from_round = self.received.get(id).and_then(|r| r.get(&round));
            let local = open.iter().find(|(o, _)| *o == id).map(|(_, s)| *s);
            let older = self.received.get(id).and_then(|r| r.range(..round).next_back()).map(|(_, s)| s);
            if let Some(s) = from_round.or(local).or(older) {
                merged.try_merge(s)?;
            }
        }
        self.fitted = Some(round);
        Ok(Some((merged, RoundFit { round, missing })))
    }
}

impl Rounds {
    /// The statistics of every round held in full (a value of every input
    /// partition), merged into `base` as that round's fit merged them,
    /// newest round first. A partition that moved names the snapshot its
    /// previous owner committed with; when this instance does not hold it,
    /// one of these can give it back (same statistics, same version).
    /// Reads what the exchange has first; best effort: a round whose fit
    /// went ahead without some partition's value cannot be rebuilt.
    pub fn held_rounds(&mut self, base: &PathStats) -> Vec<PathStats> {
        if let Err(e) = self.read() {
            tracing::warn!(error = %format!("{e:#}"), "cannot read the shared path statistics");
        }
        if self.partitions.is_empty() {
            if let Ok(p) = self.exchange.partitions() {
                self.partitions = p;
            }
        }
        let all = with_partitions(&self.partitions, self.received.keys());
        let rounds: std::collections::BTreeSet<i64> = self.received.values().flat_map(|r| r.keys().copied()).collect();
        let mut held = Vec::new();
        for round in rounds.into_iter().rev() {
            let values: Option<Vec<&PathStats>> =
                all.iter().map(|id| self.received.get(*id).and_then(|r| r.get(&round))).collect();
            let Some(values) = values else { continue };
            let mut merged = base.clone();
            if values.into_iter().all(|s| merged.try_merge(s).is_ok()) {
                held.push(merged);
            }
        }
        held
    }
}

impl Rounds {
    /// Takes what the exchange has since the last read.
    fn read(&mut self) -> Result<()> {
        for p in self.exchange.receive()? {
            self.received.entry(p.part).or_default().insert(p.round, p.stats);
        }
        Ok(())
    }
}

/// The input partitions and any of `extra` not among them, in partition
/// order (the order every instance merges in).
fn with_partitions<'a>(partitions: &'a [PartId], extra: impl Iterator<Item = &'a PartId>) -> Vec<&'a PartId> {
    let mut all: Vec<&PartId> = partitions.iter().collect();
    all.extend(extra.filter(|id| !partitions.contains(id)));
    all.sort();
    all
}

/// An exchange in memory, shared by the pipelines of one test as the
/// statistics topic is by the instances of a group.
#[derive(Clone)]
pub struct MemoryExchange {
    log: std::sync::Arc<std::sync::Mutex<Vec<Published>>>,
    read: usize,
    partitions: Vec<PartId>,
}

impl MemoryExchange {
    /// An empty exchange for a group reading `partitions`.
    pub fn new(partitions: Vec<PartId>) -> Self {
        MemoryExchange { log: Default::default(), read: 0, partitions }
    }
}

impl StatsExchange for MemoryExchange {
    fn partitions(&mut self) -> Result<Vec<PartId>> {
        Ok(self.partitions.clone())
    }

    fn publish(&mut self, round: i64, parts: &[(&PartId, &PathStats)]) -> Result<()> {
        let mut log = self.log.lock().expect("exchange");
        log.extend(parts.iter().map(|(id, s)| Published { part: (*id).clone(), round, stats: (*s).clone() }));
        Ok(())
    }

    fn receive(&mut self) -> Result<Vec<Published>> {
        let log = self.log.lock().expect("exchange");
        let new = log[self.read..].to_vec();
        self.read = log.len();
        Ok(new)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stats(paths: &[(&[&str], bool)]) -> PathStats {
        let mut s = PathStats::new(1);
        for (p, c) in paths {
            s.add_path(p, *c);
        }
        s
    }

    fn parts() -> (PartId, PartId) {
        (PartId::new("t", 0), PartId::new("t", 1))
    }

    // Check values derived by hand: two instances, one partition each; the
    // merged statistics hold both partitions' paths (3 paths, 2
    // conversions), the same on both, and equal PathStats::merge of the two.
    #[test]
    fn two_instances_fit_the_same_merged_statistics_once_both_published() {
        let (p0, p1) = parts();
        let ex = MemoryExchange::new(vec![p0.clone(), p1.clone()]);
        let wait = Duration::from_secs(3600);
        let mut a = Rounds::new(Box::new(ex.clone()), 1000, wait);
        let mut b = Rounds::new(Box::new(ex), 1000, wait);
        let s0 = stats(&[(&["email", "seo"], true), (&["seo"], false)]);
        let s1 = stats(&[(&["display"], true)]);
        let t = Instant::now();
        // a publishes p0 and waits for p1.
        assert!(a.step(5_100, t, &[(&p0, &s0)], PathStats::new(1)).unwrap().is_none());
        // b publishes p1; it has both now.
        let (fb, rb) = b.step(5_200, t, &[(&p1, &s1)], PathStats::new(1)).unwrap().expect("complete");
        let (fa, ra) = a.step(5_300, t, &[(&p0, &s0)], PathStats::new(1)).unwrap().expect("complete");
        assert_eq!(ra, RoundFit { round: 5, missing: 0 });
        assert_eq!(rb, ra);
        assert_eq!((fa.paths(), fa.conversions()), (3, 2));
        assert_eq!(fa.fingerprint(), fb.fingerprint());
        let mut want = s0.clone();
        want.merge(&s1);
        assert_eq!(fa.fingerprint(), want.fingerprint());
        // Once per round.
        assert!(a.step(5_900, t, &[(&p0, &s0)], PathStats::new(1)).unwrap().is_none());
    }

    // A value published later in the round (the live statistics moved on)
    // does not replace the round's: the fit merges what was published.
    #[test]
    fn a_round_publishes_each_partition_once() {
        let (p0, _) = parts();
        let ex = MemoryExchange::new(vec![p0.clone()]);
        let mut a = Rounds::new(Box::new(ex.clone()), 1000, Duration::from_secs(3600));
        let s0 = stats(&[(&["seo"], true)]);
        let t = Instant::now();
        let (f, _) = a.step(1_000, t, &[(&p0, &s0)], PathStats::new(1)).unwrap().expect("alone, complete");
        assert_eq!(f.paths(), 1);
        let more = stats(&[(&["seo"], true), (&["email"], false)]);
        assert!(a.step(1_500, t, &[(&p0, &more)], PathStats::new(1)).unwrap().is_none());
        let (f, _) = a.step(2_000, t, &[(&p0, &more)], PathStats::new(1)).unwrap().expect("next round");
        assert_eq!(f.paths(), 2);
        assert_eq!(ex.log.lock().unwrap().len(), 2, "one value per round");
    }

    // A partition nobody publishes: the round waits, then fits on what it
    // has and says how many were missing.
    #[test]
    fn a_missing_partition_delays_the_fit_until_the_wait_is_over() {
        let (p0, p1) = parts();
        let ex = MemoryExchange::new(vec![p0.clone(), p1.clone()]);
        let mut a = Rounds::new(Box::new(ex), 1000, Duration::from_millis(400));
        let s0 = stats(&[(&["seo"], true)]);
        let t = Instant::now();
        assert!(a.step(7_000, t, &[(&p0, &s0)], PathStats::new(1)).unwrap().is_none());
        assert!(a.step(7_100, t + Duration::from_millis(399), &[(&p0, &s0)], PathStats::new(1)).unwrap().is_none());
        let (f, r) =
            a.step(7_200, t + Duration::from_millis(400), &[(&p0, &s0)], PathStats::new(1)).unwrap().expect("waited");
        assert_eq!(r, RoundFit { round: 7, missing: 1 });
        assert_eq!(f.paths(), 1);
    }
}
