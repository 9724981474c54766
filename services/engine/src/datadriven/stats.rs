//! Path statistics: the only input of the data-driven models.
//!
//! [`PathStats`] counts closed paths two ways at once:
//!
//! - per **channel set** (the set of distinct channels of a path): how many
//!   converting and non-converting paths had exactly that set (`shapley`);
//! - per **transition** of the order-k Markov chain (`markov`): a path
//!   `c1..cn` adds `START -> s1 -> ... -> sn -> CONVERSION` (or `NULL`), where
//!   the state after touch j is the tuple of the last `min(j, k)` channels
//!   `(c_{j-k+1}, ..., c_j)`. The first k-1 states of a path are therefore
//!   shorter tuples (as if the path were padded with START); for k = 1 the
//!   states are the channels themselves.
//!
//! Updates are incremental ([`PathStats::add_path`]) and statistics from
//! several sources add up ([`PathStats::merge`]), so `serve` can keep them in
//! the store and refit on a schedule while `replay` builds them in one pass.
//!
//! Internally channels and states are interned to small integers in order of
//! first appearance (fast updates); everything visible from outside (the
//! serde form, equality and [`PathStats::fingerprint`]) goes through a
//! canonical form sorted by channel name, so equal counts are equal
//! statistics whatever order the paths arrived in.
//!
//! ## Channel cap and the overflow bucket
//!
//! With a cap ([`PathStats::with_max_channels`]) at most that many channels
//! are counted under their own names: the **smallest names** (byte-wise) of
//! all channels seen. Every other channel is counted under one bucket,
//! [`OVERFLOW_CHANNEL`] (a name the event contract rejects, so it never
//! collides with a real channel). When a channel arrives whose name sorts
//! before the largest kept one, that largest one leaves: everything counted
//! under it moves into the bucket (its sets and states are rewritten as if
//! its touches had been the bucket's all along). Why the smallest names and
//! not the first arrivals: the kept set is then a function of the set of
//! channels seen, not of the order paths closed in, so statistics built in
//! one pass (`replay`), per partition and merged (`serve`), or across
//! restarts are equal. Counting a path through the bucket is exactly
//! counting the path with every bucketed channel renamed to the bucket, for
//! channel sets (a set holding several bucketed channels holds the bucket
//! once) and Markov states alike, so renaming later gives the same counts
//! as renaming at once. The price: a producer sending names that sort
//! first can push real channels into the bucket (watch the overflow
//! metric). Raising the cap keeps what is in the bucket there; lowering it
//! moves the largest names into it at once.
//!
//! ## Change tracking
//!
//! With [`PathStats::track_changes`], the counters changed since the last
//! [`PathStats::take_delta`] are remembered, so a store can write only
//! those (see apportion-store's key table).
//!
//! Serde form (JSON shown):
//! ```json
//! {"markov_order":1,"paths":2,"conversions":1,
//!  "channel_sets":[{"channels":["email","paid_search"],"conversions":1,"non_conversions":0}, ...],
//!  "transitions":[{"from":"start","to":{"state":["email"]},"count":1}, ...]}
//! ```

use std::collections::{BTreeSet, HashMap, HashSet};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// Highest supported Markov order.
pub const MAX_MARKOV_ORDER: usize = 4;

/// The channel name of the overflow bucket (module docs, "Channel cap"):
/// starts with U+0000, which the event contract never accepts in a channel
/// (docs/contract.md, "Input events"), so no real channel can be named so.
pub const OVERFLOW_CHANNEL: &str = "\u{0}overflow";

/// The default channel cap of `serve` and `replay` (`max_channels`).
pub const DEFAULT_MAX_CHANNELS: usize = 200;

/// Interned node id of START in the transition table.
pub(crate) const START: u32 = u32::MAX;
/// Interned node id of CONVERSION.
pub(crate) const CONV: u32 = u32::MAX - 1;
/// Interned node id of NULL (no conversion).
pub(crate) const NULL: u32 = u32::MAX - 2;

/// Converting and non-converting path counts.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Outcomes {
    /// Converting paths.
    pub conversions: u64,
    /// Non-converting paths.
    pub non_conversions: u64,
}

impl Outcomes {
    /// All paths.
    pub fn total(&self) -> u64 {
        self.conversions + self.non_conversions
    }

    /// `conversions / total`, 0 when there is no path.
    pub fn rate(&self) -> f64 {
        match self.total() {
            0 => 0.0,
            t => self.conversions as f64 / t as f64,
        }
    }
}

/// Statistics that cannot be combined or decoded.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum StatsError {
    /// Markov order outside `1..=MAX_MARKOV_ORDER`.
    #[error("markov order must be 1..={MAX_MARKOV_ORDER}, got {0}")]
    Order(usize),
    /// Merging statistics of different Markov orders.
    #[error("cannot merge path statistics of markov order {theirs} into order {ours}")]
    OrderMismatch {
        /// Order of the receiving statistics.
        ours: usize,
        /// Order of the merged statistics.
        theirs: usize,
    },
    /// A decoded record is inconsistent.
    #[error("corrupt path statistics: {0}")]
    Corrupt(String),
}

/// Statistics from closed paths (see the module docs).
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(into = "StatsRecord", try_from = "StatsRecord")]
pub struct PathStats {
    order: usize,
    paths: u64,
    conversions: u64,
    /// Channel id -> name, in order of first appearance.
    channels: Vec<String>,
    channel_ids: HashMap<String, u32>,
    /// Sorted distinct channel ids -> outcomes.
    sets: HashMap<Box<[u32]>, Outcomes>,
    /// State id -> channel ids (1..=order of them).
    states: Vec<Box<[u32]>>,
    state_ids: HashMap<Box<[u32]>, u32>,
    /// (from, to) -> count; from is START or a state id, to a state id, CONV or NULL.
    transitions: HashMap<(u32, u32), u64>,
    /// At most this many channels under their own names (None: no cap).
    max_channels: Option<usize>,
    /// With a cap: the channels counted under their own names.
    kept: BTreeSet<String>,
    /// Counters changed since the last [`PathStats::take_delta`], when tracked.
    changes: Option<Changes>,
}

/// Counters changed since the last delta (interned form).
#[derive(Debug, Clone, Default)]
struct Changes {
    /// Everything may have changed (a channel moved into the bucket, a merge).
    all: bool,
    sets: HashSet<Box<[u32]>>,
    transitions: HashSet<(u32, u32)>,
}

/// One counter of [`PathStats`] in canonical (named) form.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Counter {
    /// Paths whose distinct channels are exactly `channels` (sorted by name).
    Set {
        /// The channel set, sorted by name.
        channels: Vec<String>,
        /// Their outcomes.
        outcomes: Outcomes,
    },
    /// A transition of the Markov chain.
    Transition {
        /// From START or a state.
        from: StatsNode,
        /// To a state, CONVERSION or NULL.
        to: StatsNode,
        /// How many times it was taken.
        count: u64,
    },
}

/// The counters changed since the previous delta ([`PathStats::take_delta`]).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StatsDelta {
    /// True: `counters` is every counter, and any other stored counter is
    /// stale (to be deleted). False: only the listed counters changed
    /// (each with its current value); none was removed.
    pub full: bool,
    /// The changed counters, current values.
    pub counters: Vec<Counter>,
}

impl StatsDelta {
    /// True when nothing changed.
    pub fn is_empty(&self) -> bool {
        !self.full && self.counters.is_empty()
    }
}

impl Default for PathStats {
    /// Empty statistics of Markov order 1.
    fn default() -> Self {
        PathStats::new(1)
    }
}

impl PartialEq for PathStats {
    /// Equal counts, whatever order the paths were added in.
    fn eq(&self, other: &Self) -> bool {
        self.order == other.order
            && self.paths == other.paths
            && self.conversions == other.conversions
            && self.to_record() == other.to_record()
    }
}

impl PathStats {
    /// Empty statistics for a Markov chain of `markov_order` (1..=4; 1 is
    /// the contract's default).
    ///
    /// # Panics
    /// When the order is outside `1..=MAX_MARKOV_ORDER` (validate
    /// configuration with [`PathStats::try_new`] or the constant).
    pub fn new(markov_order: usize) -> Self {
        match Self::try_new(markov_order) {
            Ok(s) => s,
            Err(e) => panic!("{e}"),
        }
    }

    /// Like [`PathStats::new`], with an error for an unsupported order.
    pub fn try_new(markov_order: usize) -> Result<Self, StatsError> {
        if !(1..=MAX_MARKOV_ORDER).contains(&markov_order) {
            return Err(StatsError::Order(markov_order));
        }
        Ok(PathStats {
            order: markov_order,
            paths: 0,
            conversions: 0,
            channels: Vec::new(),
            channel_ids: HashMap::new(),
            sets: HashMap::new(),
            states: Vec::new(),
            state_ids: HashMap::new(),
            transitions: HashMap::new(),
            max_channels: None,
            kept: BTreeSet::new(),
            changes: None,
        })
    }

    /// The same statistics with a channel cap (module docs, "Channel cap"):
    /// `Some(n)` keeps at most n channels under their own names (moving the
    /// largest names into [`OVERFLOW_CHANNEL`] now when there are more),
    /// `None` lifts the cap.
    ///
    /// # Panics
    /// When the cap is `Some(0)` (at least one channel must be kept).
    pub fn with_max_channels(mut self, max_channels: Option<usize>) -> Self {
        assert!(max_channels != Some(0), "max_channels must keep at least one channel");
        self.max_channels = max_channels;
        self.kept = match max_channels {
            Some(_) => self.channels.iter().filter(|c| *c != OVERFLOW_CHANNEL).cloned().collect(),
            None => BTreeSet::new(),
        };
        if let Some(cap) = max_channels {
            if self.kept.len() > cap {
                let keep: BTreeSet<String> = self.kept.iter().take(cap).cloned().collect();
                self = self.project(keep);
            }
        }
        self
    }

    /// The channel cap, if any.
    pub fn max_channels(&self) -> Option<usize> {
        self.max_channels
    }

    /// Starts remembering which counters change (see [`PathStats::take_delta`]).
    pub fn track_changes(&mut self) {
        if self.changes.is_none() {
            self.changes = Some(Changes::default());
        }
    }

    /// The counters changed since the previous call (or since
    /// [`PathStats::track_changes`]), with their current values, and starts
    /// a new delta. Without tracking: every counter, as a full delta.
    pub fn take_delta(&mut self) -> StatsDelta {
        let Some(ch) = self.changes.as_mut() else {
            return StatsDelta { full: true, counters: self.counters() };
        };
        let ch = std::mem::take(ch);
        if ch.all {
            return StatsDelta { full: true, counters: self.counters() };
        }
        let mut counters = Vec::with_capacity(ch.sets.len() + ch.transitions.len());
        for ids in ch.sets {
            let o = self.sets[&ids];
            let mut channels: Vec<String> = ids.iter().map(|&i| self.channels[i as usize].clone()).collect();
            channels.sort_unstable();
            counters.push(Counter::Set { channels, outcomes: o });
        }
        for (a, b) in ch.transitions {
            let count = self.transitions[&(a, b)];
            counters.push(Counter::Transition { from: self.named_node(a), to: self.named_node(b), count });
        }
        StatsDelta { full: false, counters }
    }

    /// Every counter, in canonical order.
    pub fn counters(&self) -> Vec<Counter> {
        let rec = self.to_record();
        let sets = rec.channel_sets.into_iter().map(|s| Counter::Set {
            channels: s.channels,
            outcomes: Outcomes { conversions: s.conversions, non_conversions: s.non_conversions },
        });
        let transitions =
            rec.transitions.into_iter().map(|t| Counter::Transition { from: t.from, to: t.to, count: t.count });
        sets.chain(transitions).collect()
    }

    /// Statistics from their counters (as [`PathStats::counters`] lists
    /// them, in any order) and totals, checked for consistency as the serde
    /// form is (counts that add up, states that can follow each other).
    pub fn from_counters(
        markov_order: usize,
        paths: u64,
        conversions: u64,
        counters: impl IntoIterator<Item = Counter>,
    ) -> Result<Self, StatsError> {
        let mut rec =
            StatsRecord { markov_order, paths, conversions, channel_sets: Vec::new(), transitions: Vec::new() };
        for c in counters {
            match c {
                Counter::Set { channels, outcomes } => rec.channel_sets.push(SetRecord {
                    channels,
                    conversions: outcomes.conversions,
                    non_conversions: outcomes.non_conversions,
                }),
                Counter::Transition { from, to, count } => rec.transitions.push(TransitionRecord { from, to, count }),
            }
        }
        PathStats::from_record(rec)
    }

    fn named_node(&self, n: u32) -> StatsNode {
        match n {
            START => StatsNode::Start,
            CONV => StatsNode::Conversion,
            NULL => StatsNode::Null,
            s => StatsNode::State(self.states[s as usize].iter().map(|&i| self.channels[i as usize].clone()).collect()),
        }
    }

    /// Rebuilt with every channel outside `keep` counted as [`OVERFLOW_CHANNEL`]
    /// (module docs, "Channel cap"); tracking marks everything changed.
    fn project(&self, keep: BTreeSet<String>) -> PathStats {
        let mut out = PathStats::new(self.order);
        out.paths = self.paths;
        out.conversions = self.conversions;
        out.max_channels = self.max_channels;
        let map: Vec<u32> = self
            .channels
            .iter()
            .map(|c| if keep.contains(c) { out.intern(c) } else { out.intern(OVERFLOW_CHANNEL) })
            .collect();
        out.add_mapped(self, &map);
        out.kept = keep;
        out.changes = self.changes.as_ref().map(|_| Changes { all: true, ..Default::default() });
        out
    }

    /// Adds the channel sets, states and transitions of `other` with its
    /// channel id `i` counted as `map[i]` of this value (a set holding two
    /// channels mapped to one id holds it once). Totals are the caller's.
    fn add_mapped(&mut self, other: &PathStats, map: &[u32]) {
        for (ids, o) in &other.sets {
            let mut mine: Vec<u32> = ids.iter().map(|&i| map[i as usize]).collect();
            mine.sort_unstable();
            mine.dedup();
            self.add_set(mine, *o);
        }
        let state_map: Vec<u32> = other
            .states
            .iter()
            .map(|t| {
                let mine: Vec<u32> = t.iter().map(|&i| map[i as usize]).collect();
                self.intern_state(&mine)
            })
            .collect();
        let node = |n: u32| if n >= NULL { n } else { state_map[n as usize] };
        for (&(a, b), &c) in &other.transitions {
            *self.transitions.entry((node(a), node(b))).or_insert(0) += c;
        }
    }

    /// Under a cap: makes room for the new channels among `names` that sort
    /// before the largest kept ones (moving those into the bucket) and keeps
    /// them, so that afterwards the kept channels are the smallest names of
    /// all seen. Without a cap: nothing.
    fn admit<'a>(&mut self, names: impl Iterator<Item = &'a str>) {
        let Some(cap) = self.max_channels else { return };
        let new: BTreeSet<&str> =
            names.filter(|c| *c != OVERFLOW_CHANNEL && !self.channel_ids.contains_key(*c)).collect();
        let mut evicted = false;
        for c in new {
            if self.kept.contains(c) {
                continue;
            }
            if self.kept.len() < cap {
                self.kept.insert(c.to_string());
            } else if self.kept.last().is_some_and(|max| c < max.as_str()) {
                self.kept.pop_last();
                self.kept.insert(c.to_string());
                evicted = true;
            }
        }
        if evicted {
            // Kept channels that were never counted are not in `channels`:
            // projecting keeps them out of the tables until their first touch.
            let keep = std::mem::take(&mut self.kept);
            *self = self.project(keep);
        }
    }

    /// The interned id a channel is counted under (interning it), and
    /// whether that is the bucket because of the cap.
    fn id_for(&mut self, channel: &str) -> (u32, bool) {
        if let Some(&id) = self.channel_ids.get(channel) {
            return (id, false);
        }
        if self.max_channels.is_none() || self.kept.contains(channel) {
            (self.intern(channel), false)
        } else {
            (self.intern(OVERFLOW_CHANNEL), true)
        }
    }

    /// With a cap reached: the largest kept channel name. A channel never
    /// seen whose name sorts after it would be counted in the bucket.
    pub(crate) fn overflow_above(&self) -> Option<&str> {
        match self.max_channels {
            Some(cap) if self.kept.len() >= cap => self.kept.last().map(String::as_str),
            _ => None,
        }
    }

    /// The Markov order these statistics count transitions for.
    pub fn markov_order(&self) -> usize {
        self.order
    }

    /// Number of closed paths counted.
    pub fn paths(&self) -> u64 {
        self.paths
    }

    /// Number of converting paths counted.
    pub fn conversions(&self) -> u64 {
        self.conversions
    }

    /// Number of distinct channels seen.
    pub fn channel_count(&self) -> usize {
        self.channels.len()
    }

    /// Distinct channels seen, sorted by name.
    pub fn channels(&self) -> Vec<&str> {
        let mut v: Vec<&str> = self.channels.iter().map(String::as_str).collect();
        v.sort_unstable();
        v
    }

    /// Number of distinct channel sets seen.
    pub fn channel_set_count(&self) -> usize {
        self.sets.len()
    }

    /// Number of Markov states seen (START, CONVERSION and NULL excluded).
    pub fn state_count(&self) -> usize {
        self.states.len()
    }

    /// Outcomes of paths whose set of distinct channels is exactly the set
    /// of `channels` (duplicates ignored).
    pub fn set_outcomes(&self, channels: &[&str]) -> Outcomes {
        let mut ids = Vec::with_capacity(channels.len());
        for c in channels {
            match self.channel_ids.get(*c) {
                Some(&id) => ids.push(id),
                None => return Outcomes::default(),
            }
        }
        ids.sort_unstable();
        ids.dedup();
        self.sets.get(&ids[..]).copied().unwrap_or_default()
    }

    fn intern(&mut self, channel: &str) -> u32 {
        if let Some(&id) = self.channel_ids.get(channel) {
            return id;
        }
        let id = self.channels.len() as u32;
        self.channels.push(channel.to_string());
        self.channel_ids.insert(channel.to_string(), id);
        id
    }

    fn intern_state(&mut self, tuple: &[u32]) -> u32 {
        if let Some(&id) = self.state_ids.get(tuple) {
            return id;
        }
        let id = self.states.len() as u32;
        self.states.push(tuple.into());
        self.state_ids.insert(tuple.into(), id);
        id
    }

    fn add_set(&mut self, sorted_ids: Vec<u32>, o: Outcomes) {
        match self.sets.get_mut(&sorted_ids[..]) {
            Some(x) => {
                x.conversions += o.conversions;
                x.non_conversions += o.non_conversions;
            }
            None => {
                self.sets.insert(sorted_ids.into_boxed_slice(), o);
            }
        }
    }

    /// Counts one closed path (channels in time order). A path with no
    /// touch is not a path (docs/contract.md, "Journey rules") and is ignored.
    /// Returns how many of its touches were counted in the overflow bucket
    /// because of the channel cap (module docs).
    pub fn add_path(&mut self, channels: &[&str], converted: bool) -> usize {
        if channels.is_empty() {
            return 0;
        }
        self.admit(channels.iter().copied());
        let mut overflowed = 0;
        let ids: Vec<u32> = channels
            .iter()
            .map(|c| {
                let (id, over) = self.id_for(c);
                overflowed += usize::from(over);
                id
            })
            .collect();
        self.paths += 1;
        if converted {
            self.conversions += 1;
        }
        let mut set = ids.clone();
        set.sort_unstable();
        set.dedup();
        let o = if converted {
            Outcomes { conversions: 1, non_conversions: 0 }
        } else {
            Outcomes { conversions: 0, non_conversions: 1 }
        };
        if let Some(ch) = self.changes.as_mut() {
            if !ch.all && !ch.sets.contains(&set[..]) {
                ch.sets.insert(set.clone().into_boxed_slice());
            }
        }
        self.add_set(set, o);

        let mut prev = START;
        for j in 0..ids.len() {
            let lo = (j + 1).saturating_sub(self.order);
            let s = self.intern_state(&ids[lo..=j]);
            self.count_transition(prev, s);
            prev = s;
        }
        let end = if converted { CONV } else { NULL };
        self.count_transition(prev, end);
        overflowed
    }

    fn count_transition(&mut self, a: u32, b: u32) {
        *self.transitions.entry((a, b)).or_insert(0) += 1;
        if let Some(ch) = self.changes.as_mut() {
            if !ch.all {
                ch.transitions.insert((a, b));
            }
        }
    }

    /// Adds the counts of `other` (same Markov order).
    ///
    /// # Panics
    /// When the orders differ; use [`PathStats::try_merge`] to get an error.
    pub fn merge(&mut self, other: &PathStats) {
        if let Err(e) = self.try_merge(other) {
            panic!("{e}");
        }
    }

    /// Adds the counts of `other`, or fails (changing nothing) when the
    /// Markov orders differ. Under a cap (this value's), the result keeps
    /// the smallest names of both (module docs, "Channel cap").
    pub fn try_merge(&mut self, other: &PathStats) -> Result<(), StatsError> {
        if self.order != other.order {
            return Err(StatsError::OrderMismatch { ours: self.order, theirs: other.order });
        }
        self.admit(other.channels.iter().map(String::as_str));
        let map: Vec<u32> = other.channels.iter().map(|c| self.id_for(c).0).collect();
        self.paths += other.paths;
        self.conversions += other.conversions;
        self.add_mapped(other, &map);
        if let Some(ch) = self.changes.as_mut() {
            ch.all = true;
        }
        Ok(())
    }

    /// The counts in canonical order, channels replaced by their rank in
    /// name order (comparing rank tuples is comparing name tuples, and no
    /// string is copied).
    fn canonical(&self) -> Canonical {
        let mut by_name: Vec<u32> = (0..self.channels.len() as u32).collect();
        by_name.sort_unstable_by(|&a, &b| self.channels[a as usize].cmp(&self.channels[b as usize]));
        let mut rank = vec![0u32; self.channels.len()];
        for (r, &id) in by_name.iter().enumerate() {
            rank[id as usize] = r as u32;
        }
        let mut sets: Vec<(Vec<u32>, Outcomes)> = self
            .sets
            .iter()
            .map(|(ids, o)| {
                let mut r: Vec<u32> = ids.iter().map(|&i| rank[i as usize]).collect();
                r.sort_unstable();
                (r, *o)
            })
            .collect();
        sets.sort_unstable_by(|a, b| a.0.cmp(&b.0));
        let node = |n: u32| -> (u8, Vec<u32>) {
            match n {
                START => (0, Vec::new()),
                CONV => (2, Vec::new()),
                NULL => (3, Vec::new()),
                s => (1, self.states[s as usize].iter().map(|&i| rank[i as usize]).collect()),
            }
        };
        let mut transitions: Vec<CanonicalTransition> =
            self.transitions.iter().map(|(&(a, b), &c)| (node(a), node(b), c)).collect();
        transitions.sort_unstable_by(|a, b| (&a.0, &a.1).cmp(&(&b.0, &b.1)));
        Canonical { by_name, sets, transitions }
    }

    /// Deterministic hex digest (SHA-256) of the counts: equal statistics
    /// give equal fingerprints whatever order the paths were added in. The
    /// data-driven models name their snapshot after it.
    ///
    /// Hashed bytes (integers u64 little-endian, a string as its byte
    /// length then its UTF-8 bytes, a channel list as its length then the
    /// strings): `"apportion.path-stats.v1\0"`, order, paths, conversions;
    /// the number of channel sets, then per set in canonical order its
    /// sorted channel list, conversions, non-conversions; the number of
    /// transitions, then per transition in canonical order `from`, `to`
    /// (each a tag byte 0 START, 1 state followed by its channel list,
    /// 2 CONVERSION, 3 NULL) and the count. Canonical order is the serde
    /// form's: by channel names, byte-wise. Statistics at their channel cap
    /// (module docs; a channel never seen would go to the bucket, so the
    /// cap changes credit) append `"max_channels\0"` and the cap.
    pub fn fingerprint(&self) -> String {
        let c = self.canonical();
        let name = |r: u32| self.channels[c.by_name[r as usize] as usize].as_bytes();
        let mut h = Buffered::default();
        h.update(b"apportion.path-stats.v1\0");
        h.update((self.order as u64).to_le_bytes());
        h.update(self.paths.to_le_bytes());
        h.update(self.conversions.to_le_bytes());
        let names = |h: &mut Buffered, v: &[u32]| {
            h.update((v.len() as u64).to_le_bytes());
            for &r in v {
                let s = name(r);
                h.update((s.len() as u64).to_le_bytes());
                h.update(s);
            }
        };
        h.update((c.sets.len() as u64).to_le_bytes());
        for (set, o) in &c.sets {
            names(&mut h, set);
            h.update(o.conversions.to_le_bytes());
            h.update(o.non_conversions.to_le_bytes());
        }
        h.update((c.transitions.len() as u64).to_le_bytes());
        for (from, to, count) in &c.transitions {
            for (tag, v) in [from, to] {
                h.update([*tag]);
                if *tag == 1 {
                    names(&mut h, v);
                }
            }
            h.update(count.to_le_bytes());
        }
        if let (Some(cap), Some(_)) = (self.max_channels, self.overflow_above()) {
            h.update(b"max_channels\0");
            h.update((cap as u64).to_le_bytes());
        }
        hex::encode(h.finish())
    }

    // ---- read access for the models (interned form) ----

    /// Channel names by interned id.
    pub(crate) fn raw_channels(&self) -> &[String] {
        &self.channels
    }

    /// Sorted channel-id sets and their outcomes.
    pub(crate) fn raw_sets(&self) -> &HashMap<Box<[u32]>, Outcomes> {
        &self.sets
    }

    /// State tuples (channel ids) by state id.
    pub(crate) fn raw_states(&self) -> &[Box<[u32]>] {
        &self.states
    }

    /// Transition counts by (from, to) node ids.
    pub(crate) fn raw_transitions(&self) -> &HashMap<(u32, u32), u64> {
        &self.transitions
    }

    fn to_record(&self) -> StatsRecord {
        let c = self.canonical();
        let names = |v: &[u32]| -> Vec<String> {
            v.iter().map(|&r| self.channels[c.by_name[r as usize] as usize].clone()).collect()
        };
        let node = |(tag, v): &(u8, Vec<u32>)| match tag {
            0 => StatsNode::Start,
            1 => StatsNode::State(names(v)),
            2 => StatsNode::Conversion,
            _ => StatsNode::Null,
        };
        let channel_sets = c
            .sets
            .iter()
            .map(|(v, o)| SetRecord {
                channels: names(v),
                conversions: o.conversions,
                non_conversions: o.non_conversions,
            })
            .collect();
        let transitions = c
            .transitions
            .iter()
            .map(|(a, b, count)| TransitionRecord { from: node(a), to: node(b), count: *count })
            .collect();
        StatsRecord {
            markov_order: self.order,
            paths: self.paths,
            conversions: self.conversions,
            channel_sets,
            transitions,
        }
    }

    fn from_record(rec: StatsRecord) -> Result<Self, StatsError> {
        let bad = |m: String| Err(StatsError::Corrupt(m));
        let mut s = PathStats::try_new(rec.markov_order)?;
        s.paths = rec.paths;
        s.conversions = rec.conversions;
        if rec.conversions > rec.paths {
            return bad(format!("{} conversions in {} paths", rec.conversions, rec.paths));
        }
        let (mut conv, mut all) = (0u64, 0u64);
        for set in rec.channel_sets {
            if set.channels.is_empty() {
                return bad("empty channel set".into());
            }
            let o = Outcomes { conversions: set.conversions, non_conversions: set.non_conversions };
            conv += o.conversions;
            all += o.total();
            let mut ids: Vec<u32> = set.channels.iter().map(|c| s.intern(c)).collect();
            ids.sort_unstable();
            ids.dedup();
            if ids.len() != set.channels.len() {
                return bad("channel set with a repeated channel".into());
            }
            if s.sets.contains_key(&ids[..]) {
                return bad("channel set listed twice".into());
            }
            s.add_set(ids, o);
        }
        if conv != rec.conversions || all != rec.paths {
            return bad("channel-set counts do not add up to the path counts".into());
        }
        let (mut from_start, mut into_conv, mut into_null) = (0u64, 0u64, 0u64);
        for t in rec.transitions {
            let node = |n: &StatsNode, s: &mut PathStats| -> Result<u32, StatsError> {
                Ok(match n {
                    StatsNode::Start => START,
                    StatsNode::Conversion => CONV,
                    StatsNode::Null => NULL,
                    StatsNode::State(v) => {
                        if v.is_empty() || v.len() > s.order {
                            return Err(StatsError::Corrupt(format!(
                                "state of {} channels at order {}",
                                v.len(),
                                s.order
                            )));
                        }
                        let ids: Vec<u32> = v.iter().map(|c| s.intern(c)).collect();
                        s.intern_state(&ids)
                    }
                })
            };
            let a = node(&t.from, &mut s)?;
            let b = node(&t.to, &mut s)?;
            if a == CONV || a == NULL || b == START {
                return bad("transition out of an absorbing state or into START".into());
            }
            if let StatsNode::State(to) = &t.to {
                let ok = match &t.from {
                    StatsNode::Start => to.len() == 1,
                    StatsNode::State(from) => {
                        let mut next: Vec<&String> = from.iter().collect();
                        next.push(to.last().expect("non-empty"));
                        let lo = next.len().saturating_sub(s.order);
                        next[lo..].iter().copied().eq(to.iter())
                    }
                    _ => false,
                };
                if !ok {
                    return bad("transition between states that cannot follow each other".into());
                }
            }
            if s.transitions.insert((a, b), t.count).is_some() {
                return bad("transition listed twice".into());
            }
            match (a, b) {
                (START, _) => from_start += t.count,
                (_, CONV) => into_conv += t.count,
                (_, NULL) => into_null += t.count,
                _ => {}
            }
        }
        if from_start != rec.paths || into_conv != rec.conversions || into_null != rec.paths - rec.conversions {
            return bad("transition counts do not add up to the path counts".into());
        }
        Ok(s)
    }
}

/// SHA-256 fed in 64 KiB chunks (many tiny updates cost more than the hash).
#[derive(Default)]
struct Buffered {
    sha: Sha256,
    buf: Vec<u8>,
}

impl Buffered {
    fn update(&mut self, bytes: impl AsRef<[u8]>) {
        self.buf.extend_from_slice(bytes.as_ref());
        if self.buf.len() >= 1 << 16 {
            self.sha.update(&self.buf);
            self.buf.clear();
        }
    }

    fn finish(mut self) -> [u8; 32] {
        self.sha.update(&self.buf);
        self.sha.finalize().into()
    }
}

/// [`PathStats`] in canonical order, channels as ranks in name order.
struct Canonical {
    /// Channel id by rank.
    by_name: Vec<u32>,
    sets: Vec<(Vec<u32>, Outcomes)>,
    transitions: Vec<CanonicalTransition>,
}

/// A node as (0 START | 1 state | 2 CONVERSION | 3 NULL, channel ranks).
type CanonicalNode = (u8, Vec<u32>);
/// (from, to, count).
type CanonicalTransition = (CanonicalNode, CanonicalNode, u64);

/// A node of the transition table in canonical (named) form.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StatsNode {
    /// START.
    Start,
    /// A state: the last up to `markov_order` channels, oldest first.
    State(Vec<String>),
    /// CONVERSION (absorbing).
    Conversion,
    /// NULL, no conversion (absorbing).
    Null,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct SetRecord {
    channels: Vec<String>,
    conversions: u64,
    non_conversions: u64,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct TransitionRecord {
    from: StatsNode,
    to: StatsNode,
    count: u64,
}

/// The canonical, serialized form of [`PathStats`].
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct StatsRecord {
    markov_order: usize,
    paths: u64,
    conversions: u64,
    channel_sets: Vec<SetRecord>,
    transitions: Vec<TransitionRecord>,
}

impl From<PathStats> for StatsRecord {
    fn from(s: PathStats) -> Self {
        s.to_record()
    }
}

impl TryFrom<StatsRecord> for PathStats {
    type Error = StatsError;
    fn try_from(r: StatsRecord) -> Result<Self, StatsError> {
        PathStats::from_record(r)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_sets_and_transitions() {
        let mut s = PathStats::new(2);
        s.add_path(&["a", "b", "a"], true);
        s.add_path(&[], true);
        assert_eq!((s.paths(), s.conversions()), (1, 1));
        assert_eq!(s.set_outcomes(&["b", "a"]), Outcomes { conversions: 1, non_conversions: 0 });
        // states (a), (a,b), (b,a): START->(a)->(a,b)->(b,a)->CONV
        assert_eq!(s.state_count(), 3);
        assert_eq!(s.raw_transitions().values().sum::<u64>(), 4);
    }

    #[test]
    fn bad_records_are_rejected() {
        let mut s = PathStats::new(1);
        s.add_path(&["a", "b"], false);
        let mut v = serde_json::to_value(&s).unwrap();
        v["paths"] = 2.into();
        assert!(serde_json::from_value::<PathStats>(v).is_err());
        let mut v = serde_json::to_value(&s).unwrap();
        v["transitions"][0]["count"] = 5.into();
        assert!(serde_json::from_value::<PathStats>(v).is_err());
        assert!(PathStats::try_new(0).is_err() && PathStats::try_new(5).is_err());
    }
}
