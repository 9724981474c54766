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
//! Serde form (JSON shown):
//! ```json
//! {"markov_order":1,"paths":2,"conversions":1,
//!  "channel_sets":[{"channels":["email","paid_search"],"conversions":1,"non_conversions":0}, ...],
//!  "transitions":[{"from":"start","to":{"state":["email"]},"count":1}, ...]}
//! ```

use std::collections::HashMap;

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

/// Highest supported Markov order.
pub const MAX_MARKOV_ORDER: usize = 4;

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
        })
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
    pub fn add_path(&mut self, channels: &[&str], converted: bool) {
        if channels.is_empty() {
            return;
        }
        let ids: Vec<u32> = channels.iter().map(|c| self.intern(c)).collect();
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
        self.add_set(set, o);

        let mut prev = START;
        for j in 0..ids.len() {
            let lo = (j + 1).saturating_sub(self.order);
            let s = self.intern_state(&ids[lo..=j]);
            *self.transitions.entry((prev, s)).or_insert(0) += 1;
            prev = s;
        }
        let end = if converted { CONV } else { NULL };
        *self.transitions.entry((prev, end)).or_insert(0) += 1;
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
    /// Markov orders differ.
    pub fn try_merge(&mut self, other: &PathStats) -> Result<(), StatsError> {
        if self.order != other.order {
            return Err(StatsError::OrderMismatch { ours: self.order, theirs: other.order });
        }
        let map: Vec<u32> = other.channels.iter().map(|c| self.intern(c)).collect();
        self.paths += other.paths;
        self.conversions += other.conversions;
        for (ids, o) in &other.sets {
            let mut mine: Vec<u32> = ids.iter().map(|&i| map[i as usize]).collect();
            mine.sort_unstable();
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
    /// form's: by channel names, byte-wise.
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
            0 => Node::Start,
            1 => Node::State(names(v)),
            2 => Node::Conversion,
            _ => Node::Null,
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
            let node = |n: &Node, s: &mut PathStats| -> Result<u32, StatsError> {
                Ok(match n {
                    Node::Start => START,
                    Node::Conversion => CONV,
                    Node::Null => NULL,
                    Node::State(v) => {
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
            if let Node::State(to) = &t.to {
                let ok = match &t.from {
                    Node::Start => to.len() == 1,
                    Node::State(from) => {
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
enum Node {
    Start,
    State(Vec<String>),
    Conversion,
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
    from: Node,
    to: Node,
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
