//! Large inputs for the replay benchmark, streamed to a file.
//!
//! Journeys come from the same generative model as the simulator
//! ([`Scenario::journey`]) but arrive as a Poisson process over `days`, and
//! each journey belongs to a user drawn uniformly from `users` ids, so a user
//! can have several journeys, some overlapping, as returning shoppers do.
//! A small share of lines is delivered twice (`dup_rate`), as an
//! at-least-once pipeline would, to exercise duplicate dropping.
//!
//! Memory is bounded by the journeys in flight, not by the output size:
//!
//! - time-sorted (default): a min-heap holds the pending events of journeys
//!   that have started; an event is written once no journey that starts
//!   later can precede it (every event of a journey is at or after its start);
//! - `unsorted`: each journey is written whole when it starts, as a per-user
//!   export would, so the file is out of time order by up to a journey's
//!   length (about three weeks).
//!
//! With `open_journeys`, no conversion is written and journey k goes to
//! user `k mod users` instead of a drawn one, so every user id has touches
//! and no conversion once there are at least as many journeys as users: the
//! input leaves `users` journeys open (for the memory benchmark). The
//! journeys themselves are the same as without the option.

use std::cmp::Reverse;
use std::collections::BinaryHeap;
use std::io::Write;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::lines::{LineWriter, TimeForm};
use crate::scenario::{Scenario, SimJourney};
use crate::simulate::DEFAULT_START_MS;
use crate::LoadError;

/// What to generate.
#[derive(Debug, Clone, PartialEq)]
pub struct GenOptions {
    /// Lines to write (duplicates included).
    pub events: u64,
    /// Number of distinct user ids to draw from.
    pub users: u64,
    /// Seed.
    pub seed: u64,
    /// Write each journey whole instead of in time order.
    pub unsorted: bool,
    /// Journeys start over this many days.
    pub days: u32,
    /// Probability that a line is written twice.
    pub dup_rate: f64,
    /// Start of generated time, epoch ms.
    pub start_ms: i64,
    /// No conversions; users in turn (see the module docs).
    pub open_journeys: bool,
}

impl GenOptions {
    /// Defaults: time-sorted, 180 days from 2026-03-01, 0.1% duplicates.
    pub fn new(events: u64, users: u64, seed: u64) -> Self {
        GenOptions {
            events,
            users,
            seed,
            unsorted: false,
            days: 180,
            dup_rate: 0.001,
            start_ms: DEFAULT_START_MS,
            open_journeys: false,
        }
    }
}

/// What was generated.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct GenSummary {
    /// Lines written.
    pub lines: u64,
    /// Touch lines (first deliveries).
    pub touches: u64,
    /// Conversion lines (first deliveries).
    pub conversions: u64,
    /// Repeated lines.
    pub duplicates: u64,
    /// Journeys started.
    pub journeys: u64,
    /// Largest number of pending events held at once (sorted mode).
    pub max_pending: u64,
    /// With `open_journeys`: distinct users with at least one line written
    /// (each ends with an open journey); 0 otherwise.
    pub open_users: u64,
    /// Earliest and latest event time written, epoch ms.
    pub first_ms: i64,
    /// Latest event time written.
    pub last_ms: i64,
}

/// A pending event: ordered by (time, sequence).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
struct Pending {
    ts: i64,
    seq: u64,
    user: u64,
    /// Channel index, or `CONVERSION`.
    channel: u8,
    campaign: u8,
    view: bool,
    value_cents: u64,
}

const CONVERSION: u8 = u8::MAX;

/// Mean lines per journey (conversion lines counted when `conversions`),
/// estimated from 20 000 journeys of a separate stream.
pub fn mean_events_per_journey(scenario: &Scenario, seed: u64, conversions: bool) -> f64 {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x0005_eed0_fa11);
    let n = 20_000;
    let total: usize = (0..n)
        .map(|_| {
            let j = scenario.journey(&mut rng);
            j.touches.len() + (conversions && j.converted) as usize
        })
        .sum();
    total as f64 / n as f64
}

struct Out<'a, W: Write> {
    w: LineWriter<W>,
    scenario: &'a Scenario,
    rng: ChaCha8Rng,
    dup_rate: f64,
    limit: u64,
    s: GenSummary,
    /// With `open_journeys`: a bit per user, set once a line of theirs is written.
    seen: Vec<u64>,
}

impl<W: Write> Out<'_, W> {
    fn full(&self) -> bool {
        self.w.lines() >= self.limit
    }

    fn emit(&mut self, p: &Pending) -> Result<(), LoadError> {
        let copies = if self.rng.gen::<f64>() < self.dup_rate { 2 } else { 1 };
        for k in 0..copies {
            if self.full() {
                return Ok(());
            }
            let id = ("ev-", p.seq);
            let user = ("sim-user-", p.user);
            if p.channel == CONVERSION {
                let sc = self.scenario;
                self.w.conversion(id, user, p.ts, TimeForm::Rfc3339, &sc.goal, p.value_cents, &sc.currency)?;
            } else {
                let c = &self.scenario.channels[p.channel as usize];
                self.w.touch(id, user, p.ts, TimeForm::Rfc3339, &c.name, &c.campaigns[p.campaign as usize], p.view)?;
            }
            if let Some(word) = self.seen.get_mut((p.user / 64) as usize) {
                let bit = 1u64 << (p.user % 64);
                if *word & bit == 0 {
                    *word |= bit;
                    self.s.open_users += 1;
                }
            }
            if k == 0 {
                if p.channel == CONVERSION {
                    self.s.conversions += 1;
                } else {
                    self.s.touches += 1;
                }
            } else {
                self.s.duplicates += 1;
            }
            if self.s.lines == 0 {
                self.s.first_ms = p.ts;
                self.s.last_ms = p.ts;
            }
            self.s.first_ms = self.s.first_ms.min(p.ts);
            self.s.last_ms = self.s.last_ms.max(p.ts);
            self.s.lines += 1;
        }
        Ok(())
    }
}

fn pending_of(j: &SimJourney, start: i64, user: u64, seq: &mut u64, conversion: bool) -> Vec<Pending> {
    let mut v = Vec::with_capacity(j.touches.len() + 1);
    for t in &j.touches {
        *seq += 1;
        v.push(Pending {
            ts: start + t.offset_ms,
            seq: *seq,
            user,
            channel: t.channel,
            campaign: t.campaign,
            view: t.view,
            value_cents: 0,
        });
    }
    if j.converted && conversion {
        *seq += 1;
        v.push(Pending {
            ts: start + j.conversion_offset_ms,
            seq: *seq,
            user,
            channel: CONVERSION,
            campaign: 0,
            view: false,
            value_cents: j.value_cents,
        });
    }
    v
}

/// Generates `opts.events` lines into `out` (see the module docs).
pub fn generate<W: Write>(scenario: &Scenario, opts: &GenOptions, out: W) -> Result<GenSummary, LoadError> {
    scenario.validate()?;
    if scenario.channels.len() >= CONVERSION as usize {
        return Err(LoadError::Scenario("too many channels for the generator".into()));
    }
    if opts.users == 0 || !(0.0..=1.0).contains(&opts.dup_rate) {
        return Err(LoadError::Scenario("users must be > 0 and dup_rate in [0, 1]".into()));
    }
    let per_journey = mean_events_per_journey(scenario, opts.seed, !opts.open_journeys) * (1.0 + opts.dup_rate);
    let journeys = (opts.events as f64 / per_journey).max(1.0);
    let span = opts.days.max(1) as f64 * 86_400_000.0;
    let mean_gap = span / journeys;

    let mut journey_rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut o = Out {
        w: LineWriter::new(out),
        scenario,
        rng: ChaCha8Rng::seed_from_u64(opts.seed.wrapping_add(0x9e37_79b9_7f4a_7c15)),
        dup_rate: opts.dup_rate,
        limit: opts.events,
        s: GenSummary::default(),
        seen: if opts.open_journeys { vec![0; opts.users.div_ceil(64) as usize] } else { Vec::new() },
    };
    let mut heap: BinaryHeap<Reverse<Pending>> = BinaryHeap::new();
    let mut seq = 0u64;
    let mut arrival = opts.start_ms as f64;
    while !o.full() {
        let next_start = arrival as i64;
        if !opts.unsorted {
            // Everything due before the next journey starts can go out now.
            while let Some(Reverse(p)) = heap.peek() {
                if p.ts > next_start || o.full() {
                    break;
                }
                let p = *p;
                heap.pop();
                o.emit(&p)?;
            }
            if o.full() {
                break;
            }
        }
        // Drawn in both modes, so the journeys are the same.
        let drawn = journey_rng.gen_range(0..opts.users);
        let user = if opts.open_journeys { o.s.journeys % opts.users } else { drawn };
        let j = scenario.journey(&mut journey_rng);
        o.s.journeys += 1;
        let events = pending_of(&j, next_start, user, &mut seq, !opts.open_journeys);
        if opts.unsorted {
            for p in &events {
                o.emit(p)?;
            }
        } else {
            heap.extend(events.into_iter().map(Reverse));
            o.s.max_pending = o.s.max_pending.max(heap.len() as u64);
        }
        // Exponential gap: a Poisson process of journey starts.
        let u: f64 = 1.0 - journey_rng.gen::<f64>();
        arrival += -u.ln() * mean_gap;
    }
    o.w.flush()?;
    Ok(o.s)
}

#[cfg(test)]
mod tests {
    use super::*;
    use apportion_engine::contract::parse_event;

    fn gen(opts: &GenOptions) -> (Vec<u8>, GenSummary) {
        let mut buf = Vec::new();
        let s = generate(&Scenario::example_shop(), opts, &mut buf).unwrap();
        (buf, s)
    }

    #[test]
    fn sorted_output_is_in_time_order_and_exactly_n_lines() {
        let mut o = GenOptions::new(20_000, 800, 3);
        o.dup_rate = 0.01;
        let (buf, s) = gen(&o);
        let text = String::from_utf8(buf).unwrap();
        let evs: Vec<_> = text.lines().map(|l| parse_event(l.as_bytes()).unwrap()).collect();
        assert_eq!(evs.len(), 20_000);
        assert_eq!(s.lines, 20_000);
        assert_eq!(s.touches + s.conversions + s.duplicates, s.lines);
        assert!(evs.windows(2).all(|w| w[0].timestamp_ms <= w[1].timestamp_ms), "time-sorted");
        let ids: std::collections::HashSet<&str> = evs.iter().map(|e| e.event_id.as_str()).collect();
        assert_eq!(ids.len() as u64, s.lines - s.duplicates);
        assert!(s.duplicates > 0 && s.conversions > 0);
        let users: std::collections::HashSet<&str> = evs.iter().map(|e| e.user_id.as_str()).collect();
        assert!(users.len() <= 800 && users.len() > 700, "{}", users.len());
        assert_eq!(s.first_ms, evs[0].timestamp_ms);
        assert_eq!(s.last_ms, evs.last().unwrap().timestamp_ms);
    }

    #[test]
    fn unsorted_holds_the_same_events_out_of_order() {
        let o = GenOptions::new(10_000, 500, 8);
        let (sorted, _) = gen(&o);
        let (unsorted, s) = gen(&GenOptions { unsorted: true, ..o });
        assert_eq!(s.max_pending, 0);
        let parse = |b: &[u8]| -> Vec<(String, i64)> {
            let text = std::str::from_utf8(b).unwrap();
            text.lines()
                .map(|l| {
                    let e = parse_event(l.as_bytes()).unwrap();
                    (e.event_id, e.timestamp_ms)
                })
                .collect()
        };
        let a = parse(&sorted);
        let b = parse(&unsorted);
        assert!(b.windows(2).any(|w| w[0].1 > w[1].1), "not in time order");
        // Same journeys: the sorted file is a time-ordered prefix of them, so
        // every event it has before the last journey start is in both.
        let bset: std::collections::HashSet<_> = b.iter().collect();
        let common = a.iter().filter(|e| bset.contains(e)).count();
        assert!(common as f64 > 0.9 * a.len() as f64, "{common} of {}", a.len());
    }

    #[test]
    fn open_journeys_have_every_user_and_no_conversion() {
        let o = GenOptions { open_journeys: true, ..GenOptions::new(20_000, 4_000, 5) };
        let (buf, s) = gen(&o);
        let text = String::from_utf8(buf).unwrap();
        let evs: Vec<_> = text.lines().map(|l| parse_event(l.as_bytes()).unwrap()).collect();
        assert_eq!(evs.len(), 20_000);
        assert_eq!(s.conversions, 0);
        assert!(!text.contains("\"conversion\""));
        assert!(s.journeys >= 4_000, "{}", s.journeys);
        let users: std::collections::HashSet<&str> = evs.iter().map(|e| e.user_id.as_str()).collect();
        assert_eq!(users.len(), 4_000);
        assert_eq!(s.open_users, 4_000);
        assert!(evs.windows(2).all(|w| w[0].timestamp_ms <= w[1].timestamp_ms), "time-sorted");
    }

    #[test]
    fn deterministic_for_a_seed() {
        let o = GenOptions::new(5_000, 300, 21);
        assert_eq!(gen(&o).0, gen(&o).0);
        assert_ne!(gen(&o).0, gen(&GenOptions { seed: 22, ..o }).0);
    }
}
