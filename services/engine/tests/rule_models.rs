//! Check values for the five rule models. Each value names where it comes from.

use apportion_engine::model::{FirstTouch, LastTouch, Linear, Model, TimeDecay, UShaped};
use apportion_engine::{Interaction, Touch};

const DAY: i64 = 86_400_000;

fn touch(channel: &str, ts: i64) -> Touch {
    Touch {
        event_id: format!("t{ts}-{channel}"),
        ts,
        seq: ts as u64,
        channel: channel.into(),
        campaign: None,
        interaction: Interaction::Click,
    }
}

fn path(days_before: &[f64], conv: i64) -> Vec<Touch> {
    days_before.iter().map(|d| touch("c", conv - (d * DAY as f64).round() as i64)).collect()
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

#[test]
fn last_and_first_touch() {
    // Definition of last touch / first touch (common practice, no source).
    let p = path(&[3.0, 2.0, 1.0], 100 * DAY);
    assert_eq!(LastTouch.credit(&p, 100 * DAY), vec![0.0, 0.0, 1.0]);
    assert_eq!(FirstTouch.credit(&p, 100 * DAY), vec![1.0, 0.0, 0.0]);
    assert_eq!(LastTouch.credit(&p[..1], 100 * DAY), vec![1.0]);
}

#[test]
fn linear_over_four_touches_is_a_quarter_each() {
    // Linear over 4 touches gives 0.25 each (common practice, no source).
    let p = path(&[4.0, 3.0, 2.0, 1.0], 100 * DAY);
    assert_eq!(Linear.credit(&p, 100 * DAY), vec![0.25; 4]);
}

#[test]
fn u_shaped_split() {
    // 0.4 / 0.2 split evenly / 0.4 (common practice, no source).
    let p = path(&[4.0, 3.0, 2.0, 1.0], 100 * DAY);
    let w = UShaped::default().credit(&p, 100 * DAY);
    let want = [0.4, 0.1, 0.1, 0.4];
    for (a, b) in w.iter().zip(want) {
        assert!(close(*a, b, 1e-12), "{w:?}");
    }
    // n = 1 gives 1, n = 2 gives 1/2 each (docs/contract.md, "Models").
    assert_eq!(UShaped::default().credit(&p[..1], 100 * DAY), vec![1.0]);
    assert_eq!(UShaped::default().credit(&p[..2], 100 * DAY), vec![0.5, 0.5]);
    // Configured endpoints: 0.3 / 0.4 split / 0.3 over three touches (arithmetic of the rule).
    let w = UShaped { first: 0.3, last: 0.3 }.credit(&p[..3], 100 * DAY);
    assert!(close(w[1], 0.4, 1e-12));
}

#[test]
fn u_shaped_a_b_a_sums_by_channel() {
    // A > B > A: A gets 0.4 + 0.4 = 0.8, B gets 0.2 (common practice, no source).
    let conv = 10 * DAY;
    let p = vec![touch("A", DAY), touch("B", 2 * DAY), touch("A", 3 * DAY)];
    let w = UShaped::default().credit(&p, conv);
    let a: f64 = p.iter().zip(&w).filter(|(t, _)| t.channel == "A").map(|(_, w)| w).sum();
    let b: f64 = p.iter().zip(&w).filter(|(t, _)| t.channel == "B").map(|(_, w)| w).sum();
    assert!(close(a, 0.8, 1e-12) && close(b, 0.2, 1e-12), "{a} {b}");
}

#[test]
fn time_decay_one_half_life_older_weighs_half() {
    // Definition of half-life: a touch one half-life older weighs exactly half.
    let conv = 100 * DAY;
    let p = vec![touch("A", conv - 8 * DAY), touch("B", conv - DAY)];
    let w = TimeDecay { half_life_ms: 7 * DAY }.credit(&p, conv);
    assert!(close(w[0] / w[1], 0.5, 1e-12), "{w:?}");
    assert!(close(w[0], 1.0 / 3.0, 1e-12));
}

#[test]
fn time_decay_log2_3_apart_gives_three_quarters() {
    // Derived from the formula: touches 7*log2(3) days apart under a 7-day
    // half-life weigh 1 : 1/3, i.e. 0.75 and 0.25.
    let conv = 100 * DAY;
    let gap = (7.0 * 3f64.log2() * DAY as f64).round() as i64;
    let p = vec![touch("A", conv - gap), touch("B", conv)];
    let w = TimeDecay { half_life_ms: 7 * DAY }.credit(&p, conv);
    assert!(close(w[0], 0.25, 1e-9) && close(w[1], 0.75, 1e-9), "{w:?}");
}

#[test]
fn time_decay_four_touches() {
    // Derived from the formula: 14, 7, 3.5 and 0 days before the conversion
    // weigh 1/4, 1/2, 2^-0.5, 1 -> normalized 0.101746, 0.203491, 0.287780, 0.406983.
    let conv = 100 * DAY;
    let p = path(&[14.0, 7.0, 3.5, 0.0], conv);
    let w = TimeDecay { half_life_ms: 7 * DAY }.credit(&p, conv);
    let want = [0.101746, 0.203491, 0.287780, 0.406983];
    for (a, b) in w.iter().zip(want) {
        assert!(close(*a, b, 5e-7), "{w:?}");
    }
}

#[test]
fn time_decay_very_old_paths_do_not_underflow() {
    // Two touches 10 years old and one half-life apart still split 1/3 : 2/3
    // (definition of half-life); a naive 2^(-age/h) underflows to 0/0 here.
    let conv = 4000 * DAY;
    let p = vec![touch("A", 0), touch("B", 7 * DAY)];
    let w = TimeDecay { half_life_ms: DAY / 1000 }.credit(&p, conv);
    assert!(w.iter().all(|x| x.is_finite()));
    let w = TimeDecay { half_life_ms: 7 * DAY }.credit(&p, conv);
    assert!(close(w[0], 1.0 / 3.0, 1e-12), "{w:?}");
}
