//! The pipeline's decisions about time, as pure functions: whether an event
//! is late, and how far an idle partition's watermark moves. Kept apart from
//! the IO so they can be tested alone and stated once (docs/contract.md,
//! "Streaming time").

use apportion_contract::EventKind;

use crate::config::LatePolicy;

/// What to do with an event, judged against its partition's watermark.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Lateness {
    /// At or after the watermark (or no watermark yet).
    OnTime,
    /// Before the watermark: to the dead-letter output, reason `late`.
    DeadLetter,
    /// Before the watermark, applied anyway (`late_policy = "apply"`).
    Apply,
}

/// Judges an event of `kind` at `ts` against `watermark` (`i64::MIN`: none
/// yet). An erase is never late: it takes effect where it arrives
/// (contract: Journey rules, Erase).
pub fn judge(kind: EventKind, ts: i64, watermark: i64, policy: LatePolicy) -> Lateness {
    if kind == EventKind::Erase || watermark == i64::MIN || ts >= watermark {
        return Lateness::OnTime;
    }
    match policy {
        LatePolicy::DeadLetter => Lateness::DeadLetter,
        LatePolicy::Apply => Lateness::Apply,
    }
}

/// True when an event at `ts` is more than `skew_ms` ahead of the
/// processing time `now_ms` of its message.
pub fn too_far_ahead(ts: i64, now_ms: i64, skew_ms: i64) -> bool {
    ts > now_ms.saturating_add(skew_ms)
}

/// The watermark of a partition after its input: the largest event time
/// seen minus the allowed lateness, never moving back.
pub fn watermark_after_input(current: i64, max_ts: i64, allowed_lateness_ms: i64) -> i64 {
    if max_ts == i64::MIN {
        return current;
    }
    current.max(max_ts.saturating_sub(allowed_lateness_ms))
}

/// The watermark of an idle partition: after `idle_timeout_ms` caught up
/// with its input (`quiet_ms`), event time is assumed to move with
/// processing time from the watermark the partition had when it caught up.
/// `None`: no advance.
pub fn idle_watermark(current: i64, at_last_input: i64, quiet_ms: i64, idle_timeout_ms: i64) -> Option<i64> {
    if current == i64::MIN || quiet_ms < idle_timeout_ms {
        return None;
    }
    let wm = at_last_input.saturating_add(quiet_ms);
    (wm > current).then_some(wm)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Check values derived by hand from the rules in docs/contract.md,
    // "Streaming time".
    #[test]
    fn lateness() {
        assert_eq!(judge(EventKind::Touch, 5, i64::MIN, LatePolicy::DeadLetter), Lateness::OnTime);
        assert_eq!(judge(EventKind::Touch, 5, 5, LatePolicy::DeadLetter), Lateness::OnTime);
        assert_eq!(judge(EventKind::Touch, 4, 5, LatePolicy::DeadLetter), Lateness::DeadLetter);
        assert_eq!(judge(EventKind::Touch, 4, 5, LatePolicy::Apply), Lateness::Apply);
    }

    #[test]
    fn future_skew() {
        assert!(!too_far_ahead(1_000 + 900_000, 1_000, 900_000));
        assert!(too_far_ahead(1_000 + 900_001, 1_000, 900_000));
        assert!(!too_far_ahead(i64::MIN, 0, 900_000));
    }

    #[test]
    fn watermarks() {
        assert_eq!(watermark_after_input(i64::MIN, i64::MIN, 5), i64::MIN);
        assert_eq!(watermark_after_input(i64::MIN, 100, 5), 95);
        assert_eq!(watermark_after_input(99, 100, 5), 99, "never moves back");
        assert_eq!(idle_watermark(i64::MIN, i64::MIN, 1_000_000, 60), None);
        assert_eq!(idle_watermark(95, 95, 59, 60), None);
        assert_eq!(idle_watermark(95, 95, 60, 60), Some(155));
        assert_eq!(idle_watermark(200, 95, 60, 60), None, "already past");
    }
}
