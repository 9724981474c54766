//! Totals and shift matrices.

use apportion_report::{CompareOptions, Comparison, ComparisonResult, CreditRecord};
use proptest::prelude::*;

use crate::support::simulated;

fn row(conv: &str, model: &str, channel: &str, position: u32, credit: f64) -> CreditRecord {
    CreditRecord {
        conversion_id: conv.into(),
        model: model.into(),
        model_version: None,
        goal: "purchase".into(),
        channel: channel.into(),
        campaign: None,
        position,
        conversion_ms: 1_772_323_200_000,
        credit,
        credited_value: None,
        currency: None,
    }
}

fn compare(groups: &[Vec<CreditRecord>], baseline: &str) -> ComparisonResult {
    let mut c = Comparison::new(CompareOptions { baseline: Some(baseline.into()), ..Default::default() });
    for g in groups {
        c.add_conversion(g).unwrap();
    }
    c.finish().unwrap()
}

/// Three conversions, two models, four channels; every number is a sum of
/// halves, quarters and eighths, so floating point holds them exactly.
///
/// Derived by hand from the definition (crate docs, "The shift matrix"):
/// per conversion a key keeps min(a, b); a loser's loss (a - b) goes to
/// the gainers in proportion to their gains (b - a) over the total gain G.
///
/// - c1: a = {x: 1}, b = {x: 1/2, y: 1/2} (b's x in two touches of 1/4).
///   x keeps 1/2; x loses 1/2, y gains 1/2 (G = 1/2): x -> y 1/2.
/// - c2: a = {x: 1/2, y: 1/2}, b = {z: 3/4, w: 1/4}. Nothing kept; G = 1;
///   x -> z 1/2 * 3/4 = 3/8, x -> w 1/2 * 1/4 = 1/8, y -> z 3/8, y -> w 1/8.
/// - c3: a = {z: 1/4, w: 3/4}, b = {z: 3/4, w: 1/4}. z keeps 1/4, w keeps
///   1/4; w loses 1/2, z gains 1/2: w -> z 1/2.
///
/// Totals under a: x 3/2, w 3/4, y 1/2, z 1/4 (the key order, by the
/// baseline's credit); under b: x 1/2, w 1/2, y 1/2, z 3/2. The matrix,
/// rows and columns in the order x, w, y, z:
///
/// ```text
///          x     w     y     z     row sum
///   x     1/2   1/8   1/2   3/8    3/2
///   w      0    1/4    0    1/2    3/4
///   y      0    1/8    0    3/8    1/2
///   z      0     0     0    1/4    1/4
///   col   1/2   1/2   1/2   3/2
/// ```
///
/// Moved (off the diagonal): 1/8 + 1/2 + 3/8 + 1/2 + 1/8 + 3/8 = 2.
#[test]
fn hand_worked_three_conversions() {
    let groups = vec![
        vec![
            row("c1", "model_a", "x", 1, 1.0),
            row("c1", "model_b", "x", 1, 0.25),
            row("c1", "model_b", "x", 2, 0.25),
            row("c1", "model_b", "y", 3, 0.5),
        ],
        vec![
            row("c2", "model_a", "x", 1, 0.5),
            row("c2", "model_a", "y", 2, 0.5),
            row("c2", "model_b", "z", 1, 0.75),
            row("c2", "model_b", "w", 2, 0.25),
        ],
        vec![
            row("c3", "model_a", "z", 1, 0.25),
            row("c3", "model_a", "w", 2, 0.75),
            row("c3", "model_b", "z", 1, 0.75),
            row("c3", "model_b", "w", 2, 0.25),
        ],
    ];
    let r = compare(&groups, "model_a");
    assert_eq!(r.keys, ["x", "w", "y", "z"]);
    assert_eq!(r.shifts.len(), 1);
    let s = &r.shifts[0];
    assert_eq!((s.from_model.as_str(), s.to_model.as_str()), ("model_a", "model_b"));
    let want = [[0.5, 0.125, 0.5, 0.375], [0.0, 0.25, 0.0, 0.5], [0.0, 0.125, 0.0, 0.375], [0.0, 0.0, 0.0, 0.25]];
    for (got, want) in s.matrix.iter().zip(want) {
        assert_eq!(got.as_slice(), want.as_slice());
    }
    assert_eq!(s.moved, 2.0);
    // Each model credits 3 conversions, and the totals are the margins above.
    for t in &r.model_totals {
        assert_eq!((t.conversions, t.credited_conversions), (3, 3.0));
    }
    let totals = |m: usize| r.rows.iter().map(|row| row.models[m].conversions).collect::<Vec<_>>();
    assert_eq!(totals(0), [1.5, 0.75, 0.5, 0.25]);
    assert_eq!(totals(1), [0.5, 0.5, 0.5, 1.5]);
    // Differences from the baseline, absolute and relative (derived by hand).
    let x = &r.rows[0].models[1];
    assert_eq!((x.conversions_difference, x.conversions_relative), (-1.0, Some(-2.0 / 3.0)));
    let z = &r.rows[3].models[1];
    assert_eq!((z.conversions_difference, z.conversions_relative), (1.25, Some(5.0)));

    // With model_b as the baseline the same moves run the other way: the
    // transpose, rows and columns in model_b's key order (z, then x, w, y by
    // name among the ties at 1/2).
    let t = compare(&groups, "model_b");
    assert_eq!(t.keys, ["z", "w", "x", "y"]);
    let idx = |k: &str, keys: &[String]| keys.iter().position(|x| x == k).unwrap();
    for (i, ki) in r.keys.iter().enumerate() {
        for (j, kj) in r.keys.iter().enumerate() {
            assert_eq!(t.shifts[0].matrix[idx(kj, &t.keys)][idx(ki, &t.keys)], s.matrix[i][j], "{ki} -> {kj}");
        }
    }
}

/// Checks the invariants that hold for any rows whose credit sums to 1 per
/// conversion and model: each model credits every conversion once, and
/// every shift matrix's row sums are the from-model's totals and its
/// column sums the to-model's (both follow from the definition; derived by
/// hand, crate docs).
fn check_margins(r: &ComparisonResult, tol: f64) {
    let model = |name: &str| r.models.iter().position(|m| m == name).unwrap();
    for t in &r.model_totals {
        assert_eq!(t.conversions, r.conversions, "{}", t.model);
        assert!((t.credited_conversions - r.conversions as f64).abs() < tol, "{}: {}", t.model, t.credited_conversions);
    }
    let pairs = r.models.len() * (r.models.len() - 1) / 2;
    assert_eq!(r.shifts.len(), pairs, "every pair once");
    for s in &r.shifts {
        let (f, t) = (model(&s.from_model), model(&s.to_model));
        for (i, row) in r.rows.iter().enumerate() {
            let row_sum: f64 = s.matrix[i].iter().sum();
            let col_sum: f64 = s.matrix.iter().map(|m| m[i]).sum();
            assert!(
                (row_sum - row.models[f].conversions).abs() < tol,
                "{} -> {} row {}",
                s.from_model,
                s.to_model,
                row.key
            );
            assert!(
                (col_sum - row.models[t].conversions).abs() < tol,
                "{} -> {} col {}",
                s.from_model,
                s.to_model,
                row.key
            );
            assert!(s.matrix[i].iter().all(|&x| x >= 0.0));
        }
    }
}

#[test]
fn totals_and_margins_on_simulated_rows() {
    let sim = simulated(2000, 5);
    let groups = apportion_report::rows::group_by_conversion(sim.credit.clone());
    let r = compare(&groups, "last_touch");
    assert_eq!(r.conversions, sim.truth.conversions, "every simulated conversion is credited");
    assert_eq!(r.models.len(), 7);
    check_margins(&r, 1e-9);
    // Campaigns: the same conversions, finer keys.
    let mut c = Comparison::new(CompareOptions { by: apportion_report::GroupBy::Campaign, ..Default::default() });
    for g in &groups {
        c.add_conversion(g).unwrap();
    }
    let rc = c.finish().unwrap();
    assert!(rc.keys.len() > r.keys.len() && rc.keys.iter().all(|k| k.contains(" / ")));
    check_margins(&rc, 1e-9);
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]
    /// Any credit vectors (per conversion and model, summing to 1) keep the margins.
    #[test]
    fn margins_hold_for_any_credit(convs in prop::collection::vec(
        prop::collection::vec(prop::collection::vec((0usize..6, 0.0f64..1.0), 1..5), 3..=3), 1..40)) {
        let models = ["first", "second", "third"];
        let groups: Vec<Vec<CreditRecord>> = convs
            .iter()
            .enumerate()
            .map(|(n, per_model)| {
                let id = format!("c{n}");
                per_model
                    .iter()
                    .zip(models)
                    .flat_map(|(touches, m)| {
                        let total: f64 = touches.iter().map(|t| t.1).sum::<f64>();
                        let k = touches.len() as f64;
                        let id = id.clone();
                        touches.iter().enumerate().map(move |(p, &(ch, w))| {
                            let credit = if total > 0.0 { w / total } else { 1.0 / k };
                            row(&id, m, &format!("ch{ch}"), p as u32 + 1, credit)
                        })
                    })
                    .collect()
            })
            .collect();
        let r = compare(&groups, "second");
        prop_assert_eq!(r.conversions, convs.len() as u64);
        check_margins(&r, 1e-9);
    }
}
