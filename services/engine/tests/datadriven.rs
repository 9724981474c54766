//! Data-driven models (`shapley`, `markov`) and their statistics.
//!
//! Check values come from outside the project: textbook cooperative games
//! (Shapley 1953; Shapley and Shubik 1954; Littlechild and Owen 1973), the
//! removal-effect worked example in the manner of Anderl et al. 2016
//! solved by hand as an absorbing chain (Kemeny and Snell 1960), and
//! independent exact re-implementations in rational arithmetic
//! (num-rational `BigRational`) of the definitions in docs/contract.md ("Models").

use std::collections::{BTreeMap, BTreeSet};

use apportion_engine::datadriven::{
    shapley_monte_carlo, shapley_values, Counter, GlobalShapley, MarkovModel, Outcomes, PathStats, ShapleyMethod,
    ShapleyModel, StatsError, OVERFLOW_CHANNEL,
};
use apportion_engine::journey::Touch;
use apportion_engine::model::Model;
use apportion_engine::Interaction;
use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, ToPrimitive, Zero};
use proptest::prelude::*;
use rand::{Rng, SeedableRng};

// ---------------------------------------------------------------- helpers

fn touches(chs: &[&str]) -> Vec<Touch> {
    chs.iter()
        .enumerate()
        .map(|(i, c)| Touch {
            event_id: format!("t{i}"),
            ts: i as i64 * 60_000,
            seq: i as u64,
            channel: c.to_string(),
            campaign: None,
            interaction: Interaction::Click,
        })
        .collect()
}

fn stats_of(paths: &[(Vec<&str>, bool)], order: usize) -> PathStats {
    let mut s = PathStats::new(order);
    for (p, c) in paths {
        s.add_path(p, *c);
    }
    s
}

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol
}

fn assert_all_close(got: &[f64], want: &[f64], tol: f64) {
    assert_eq!(got.len(), want.len());
    for (g, w) in got.iter().zip(want) {
        assert!(close(*g, *w, tol), "got {got:?}, want {want:?}");
    }
}

fn q(n: i64, d: i64) -> BigRational {
    BigRational::new(BigInt::from(n), BigInt::from(d))
}

fn f(x: &BigRational) -> f64 {
    x.to_f64().expect("finite")
}

const NAMES: [&str; 6] = ["email", "paid_search", "social", "display", "affiliate", "direct"];

fn arb_paths(
    channels: usize,
    max_len: usize,
    max_paths: usize,
) -> impl Strategy<Value = Vec<(Vec<&'static str>, bool)>> {
    prop::collection::vec((prop::collection::vec(0..channels, 1..=max_len), any::<bool>()), 1..=max_paths)
        .prop_map(|v| v.into_iter().map(|(p, c)| (p.into_iter().map(|i| NAMES[i]).collect(), c)).collect())
}

// ------------------------------------------------- Shapley: textbook games

#[test]
fn glove_game() {
    // Glove game, one left-glove owner (0) and two right-glove owners (1, 2):
    // v(S) = 1 when S holds a left and a right glove. Shapley value
    // (2/3, 1/6, 1/6): textbook example (from memory); by hand, player 0 is
    // pivotal in the 4 of 6 orders where it is not first, player 1 only in
    // the order (0, 1, 2).
    let v = |m: u64| if m & 1 == 1 && m & 0b110 != 0 { 1.0 } else { 0.0 };
    assert_all_close(&shapley_values(3, v), &[2.0 / 3.0, 1.0 / 6.0, 1.0 / 6.0], 1e-12);

    // The same game as path statistics: each winning coalition is the
    // channel set of one converting path, so v(S) = 1 exactly there.
    let stats = stats_of(
        &[(vec!["left", "right1"], true), (vec!["right2", "left"], true), (vec!["left", "right1", "right2"], true)],
        1,
    );
    let e = ShapleyModel::fit(&stats).explain_conversion(&["left", "right1", "right2"]);
    assert_eq!(e.method, ShapleyMethod::Subsets);
    let phi: Vec<f64> = e.channels.iter().map(|c| c.phi).collect();
    assert_all_close(&phi, &[2.0 / 3.0, 1.0 / 6.0, 1.0 / 6.0], 1e-12);
    assert_eq!(e.coalitions.len(), 8);
    assert!(e.coalitions_complete && !e.fallback_linear);
}

fn weighted_voting(quota: u32, weights: &'static [u32]) -> impl Fn(u64) -> f64 {
    move |m| {
        let w: u32 = weights.iter().enumerate().filter(|(i, _)| m >> i & 1 == 1).map(|(_, w)| w).sum();
        if w >= quota {
            1.0
        } else {
            0.0
        }
    }
}

#[test]
fn weighted_voting_games() {
    // Shapley and Shubik 1954: the index of [q; w1..wn] is the Shapley value
    // of the simple game "coalition weight >= q".
    // [51; 49, 49, 2]: any two players win, so all are symmetric: 1/3 each.
    assert_all_close(&shapley_values(3, weighted_voting(51, &[49, 49, 2])), &[1.0 / 3.0; 3], 1e-12);
    // [51; 50, 49, 1]: the 50 wins with either other player, the other two
    // only with it: same structure as the glove game: 2/3, 1/6, 1/6.
    assert_all_close(&shapley_values(3, weighted_voting(51, &[50, 49, 1])), &[2.0 / 3.0, 1.0 / 6.0, 1.0 / 6.0], 1e-12);
    // [4; 3, 2, 1, 1]: 1/2, 1/6, 1/6, 1/6 (standard textbook example, from
    // memory; by hand the player of weight 3 is pivotal in 12 of 24 orders).
    assert_all_close(
        &shapley_values(4, weighted_voting(4, &[3, 2, 1, 1])),
        &[0.5, 1.0 / 6.0, 1.0 / 6.0, 1.0 / 6.0],
        1e-12,
    );
}

/// Exact Shapley value of a weighted voting game `[quota; weights]` by
/// enumerating every coalition in rationals (the definition, Shapley 1953):
/// an independent check of the values quoted below.
fn exact_voting_power(quota: u32, weights: &[u32]) -> Vec<BigRational> {
    let n = weights.len();
    let fact = |k: usize| (1..=k as i64).fold(BigInt::one(), |a, b| a * b);
    (0..n)
        .map(|i| {
            let mut phi = BigRational::zero();
            for m in 0u64..(1 << n) {
                if m >> i & 1 == 1 {
                    continue;
                }
                let w: u32 = (0..n).filter(|j| m >> j & 1 == 1).map(|j| weights[j]).sum();
                if w < quota && w + weights[i] >= quota {
                    let k = m.count_ones() as usize;
                    phi += BigRational::new(fact(k) * fact(n - k - 1), fact(n));
                }
            }
            phi
        })
        .collect()
}

#[test]
fn security_council_games() {
    // Shapley and Shubik (1954), "A method for evaluating the distribution
    // of power in a committee system": the Security Council of the time,
    // [27; 5 x 5, 1 x 6] (five permanent members with veto, six others,
    // seven votes needed): 76/385 per permanent member, 1/462 per other.
    const W11: [u32; 11] = [5, 5, 5, 5, 5, 1, 1, 1, 1, 1, 1];
    let exact = exact_voting_power(27, &W11);
    for (i, v) in exact.iter().enumerate() {
        assert_eq!(*v, if i < 5 { q(76, 385) } else { q(1, 462) }, "member {i}");
    }
    let want: Vec<f64> = (0..11).map(|i| if i < 5 { 76.0 / 385.0 } else { 1.0 / 462.0 }).collect();
    assert_all_close(&shapley_values(11, weighted_voting(27, &W11)), &want, 1e-12);

    // The council after 1965, [39; 7 x 5, 1 x 10] (ten others, nine votes
    // needed): 421/2145 per permanent member, 4/2145 per other member (from
    // memory; confirmed by the exact enumeration here).
    const W: [u32; 15] = [7, 7, 7, 7, 7, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1];
    let exact = exact_voting_power(39, &W);
    for (i, v) in exact.iter().enumerate() {
        assert_eq!(*v, if i < 5 { q(421, 2145) } else { q(4, 2145) }, "member {i}");
    }
    let want: Vec<f64> = (0..15).map(|i| if i < 5 { 421.0 / 2145.0 } else { 4.0 / 2145.0 }).collect();
    assert_all_close(&shapley_values(15, weighted_voting(39, &W)), &want, 1e-12);

    // The same game through the model's global routine: one converting path
    // per winning coalition (all five permanents and 4..=10 others, 848
    // paths), so v(S) = 1 exactly on winning coalitions.
    let names: Vec<String> = (0..15).map(|i| if i < 5 { format!("p{i}") } else { format!("q{:02}", i) }).collect();
    let mut stats = PathStats::new(1);
    for others in 0u32..(1 << 10) {
        if others.count_ones() >= 4 {
            let mut path: Vec<&str> = names[..5].iter().map(String::as_str).collect();
            path.extend((0..10).filter(|j| others >> j & 1 == 1).map(|j| names[5 + j].as_str()));
            stats.add_path(&path, true);
        }
    }
    assert_eq!(stats.paths(), 848);
    let model = ShapleyModel::fit(&stats);
    let check = |g: &GlobalShapley| {
        for c in &g.channels {
            let want = if c.channel.starts_with('p') { 421.0 / 2145.0 } else { 4.0 / 2145.0 };
            assert!(close(c.value, want, 1e-12), "{}: {} vs {want}", c.channel, c.value);
            assert_eq!(c.std_error, None);
        }
        assert_eq!(g.grand_coalition_value, 1.0);
    };
    let g = model.global_values(0);
    assert_eq!(g.method, ShapleyMethod::Subsets);
    check(&g);
    let g = model.global_values_exact();
    assert_eq!(g.method, ShapleyMethod::SeenSets);
    check(&g);
}

#[test]
fn airport_game() {
    // Littlechild and Owen 1973: runway costs 10, 20, 30; c(S) = max cost in
    // S; Shapley value splits each runway segment equally among its users:
    // 10/3, 10/3 + 10/2 = 25/3, 25/3 + 10 = 55/3.
    let cost = [10.0, 20.0, 30.0];
    let v = |m: u64| (0..3).filter(|i| m >> i & 1 == 1).map(|i| cost[i]).fold(0.0, f64::max);
    assert_all_close(&shapley_values(3, v), &[10.0 / 3.0, 25.0 / 3.0, 55.0 / 3.0], 1e-12);
}

fn table_game(n: usize) -> impl Strategy<Value = Vec<f64>> {
    prop::collection::vec(-10.0f64..10.0, 1 << n)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    // Shapley 1953 axioms: efficiency, symmetry, null player, additivity.
    #[test]
    fn shapley_axioms(n in 1usize..=7, seed in any::<u64>(), a in 0usize..7, b in 0usize..7) {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let v: Vec<f64> = (0..1usize << n).map(|_| rng.gen_range(-10.0..10.0)).collect();
        let w: Vec<f64> = (0..1usize << n).map(|_| rng.gen_range(-10.0..10.0)).collect();
        let phi = shapley_values(n, |m| v[m as usize]);
        // efficiency: sum = v(N) - v({})
        let full = (1usize << n) - 1;
        prop_assert!(close(phi.iter().sum::<f64>(), v[full] - v[0], 1e-9));
        // additivity
        let psi = shapley_values(n, |m| w[m as usize]);
        let both = shapley_values(n, |m| v[m as usize] + w[m as usize]);
        for i in 0..n {
            prop_assert!(close(both[i], phi[i] + psi[i], 1e-9));
        }
        // null player: k adds nothing to any coalition
        let k = a % n;
        let null = shapley_values(n, |m| v[(m & !(1u64 << k)) as usize]);
        prop_assert!(close(null[k], 0.0, 1e-9));
        // symmetry: make i and j interchangeable, they get the same value
        let (i, j) = (a % n, b % n);
        let swap = |m: u64| {
            let (bi, bj) = (m >> i & 1, m >> j & 1);
            (m & !(1u64 << i) & !(1u64 << j)) | (bi << j) | (bj << i)
        };
        let sym = shapley_values(n, |m| v[m as usize] + v[swap(m) as usize]);
        prop_assert!(close(sym[i], sym[j], 1e-9));
    }

    #[test]
    fn shapley_of_table_matches_per_player_definition(v in table_game(5)) {
        // Literal definition, one player at a time (Shapley 1953).
        let n = 5usize;
        let fact = |k: usize| (1..=k).product::<usize>() as f64;
        let phi = shapley_values(n, |m| v[m as usize]);
        for i in 0..n {
            let mut want = 0.0;
            for s in 0..(1u64 << n) {
                if s >> i & 1 == 1 { continue; }
                let k = s.count_ones() as usize;
                want += fact(k) * fact(n - k - 1) / fact(n) * (v[(s | 1 << i) as usize] - v[s as usize]);
            }
            prop_assert!(close(phi[i], want, 1e-9));
        }
    }
}

#[test]
fn monte_carlo_lands_within_standard_errors() {
    // Random 10-player game; the permutation estimator (Castro, Gomez and
    // Tejada 2009) is unbiased, so with 20 000 permutations every player's
    // estimate should be within 4 standard errors of the exact value.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2024);
    let v: Vec<f64> = (0..1usize << 10).map(|_| rng.gen_range(0.0..1.0)).collect();
    let exact = shapley_values(10, |m| v[m as usize]);
    let est = shapley_monte_carlo(10, |m| v[m as usize], 20_000, 99);
    assert_eq!(est.permutations, 20_000);
    for (i, x) in exact.iter().enumerate() {
        let se = est.std_errors[i];
        assert!(se > 0.0 && se < 0.01, "se {se}");
        assert!((est.values[i] - x).abs() <= 4.0 * se, "player {i}: {} vs {x} (se {se})", est.values[i]);
    }
    // Efficiency holds for every single permutation, so also on average.
    assert!(close(est.values.iter().sum::<f64>(), v[1023] - v[0], 1e-9));
    // Same seed, same estimate.
    assert_eq!(est, shapley_monte_carlo(10, |m| v[m as usize], 20_000, 99));
}

// ------------------------------------------- Shapley model vs exact rational

/// Independent exact implementation of docs/contract.md's `shapley` for one
/// conversion: the literal subset sum with rational weights.
fn exact_shapley(paths: &[(Vec<&str>, bool)], conv: &[&str]) -> Vec<BigRational> {
    let mut counts: BTreeMap<BTreeSet<&str>, (i64, i64)> = BTreeMap::new();
    for (p, c) in paths {
        let e = counts.entry(p.iter().copied().collect()).or_default();
        if *c {
            e.0 += 1
        } else {
            e.1 += 1
        }
    }
    let v = |s: &BTreeSet<&str>| match counts.get(s) {
        Some(&(c, n)) if !s.is_empty() => q(c, c + n),
        _ => BigRational::zero(),
    };
    let players: Vec<&str> = {
        let mut seen = Vec::new();
        for c in conv {
            if !seen.contains(c) {
                seen.push(*c);
            }
        }
        seen
    };
    let n = players.len();
    let fact = |k: usize| (1..=k as i64).fold(BigInt::one(), |a, b| a * b);
    players
        .iter()
        .enumerate()
        .map(|(i, c)| {
            let others: Vec<&str> = players.iter().enumerate().filter(|(j, _)| *j != i).map(|(_, p)| *p).collect();
            let mut phi = BigRational::zero();
            for m in 0..(1u64 << others.len()) {
                let s: BTreeSet<&str> =
                    others.iter().enumerate().filter(|(j, _)| m >> j & 1 == 1).map(|(_, p)| *p).collect();
                let k = s.len();
                let weight = BigRational::new(fact(k) * fact(n - k - 1), fact(n));
                let mut with = s.clone();
                with.insert(c);
                phi += weight * (v(&with) - v(&s));
            }
            phi
        })
        .collect()
}

fn shares_from(values: &[f64]) -> Vec<f64> {
    let clamped: Vec<f64> = values.iter().map(|v| v.max(0.0)).collect();
    let sum: f64 = clamped.iter().sum();
    if sum > 0.0 {
        clamped.iter().map(|v| v / sum).collect()
    } else {
        vec![1.0 / values.len() as f64; values.len()]
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    #[test]
    fn shapley_model_matches_exact_rational(paths in arb_paths(5, 5, 30), conv in prop::collection::vec(0usize..6, 1..7)) {
        let conv: Vec<&str> = conv.into_iter().map(|i| NAMES[i]).collect();
        let model = ShapleyModel::fit(&stats_of(&paths, 1));
        let e = model.explain_conversion(&conv);
        let exact: Vec<f64> = exact_shapley(&paths, &conv).iter().map(f).collect();
        let phi: Vec<f64> = e.channels.iter().map(|c| c.phi).collect();
        for (g, w) in phi.iter().zip(&exact) {
            prop_assert!(close(*g, *w, 1e-9), "{phi:?} vs {exact:?}");
        }
        let share: Vec<f64> = e.channels.iter().map(|c| c.share).collect();
        let want = shares_from(&exact);
        for (g, w) in share.iter().zip(&want) {
            prop_assert!(close(*g, *w, 1e-9), "{share:?} vs {want:?}");
        }
        // The listed coalition values are the definition's v(S).
        for c in &e.coalitions {
            let names: Vec<&str> = c.channels.iter().map(String::as_str).collect();
            let o = stats_of(&paths, 1).set_outcomes(&names);
            let want = if names.is_empty() || o.total() == 0 { 0.0 } else { o.conversions as f64 / o.total() as f64 };
            prop_assert_eq!(c.value, want);
        }
    }
}

// ------------------------------------------------------ Shapley: huge paths

#[test]
fn huge_path_uses_the_exact_seen_sets_pass() {
    // 30 distinct channels: 2^30 coalitions are too many to enumerate, so the
    // model sums over the seen sets only (still the exact definition).
    // Game: v = e_N + 1/2 e_{c0} where e_T(S) = [S = T] (one converting path
    // over all 30 channels; one converting and one non-converting path with
    // c0 alone). By the definition (Shapley 1953), e_N gives each player the
    // weight of S = N\{i}: (n-1)! 0! / n! = 1/n; 1/2 e_{c0} gives c0 1/2 at
    // S = {} (weight 1/n) and each other player -1/2 at S = {c0} (weight
    // 1! (n-2)! / n! = 1/(n(n-1))). With n = 30:
    // phi(c0) = 1/30 + 1/60 = 1/20, phi(other) = 1/30 - 1/1740.
    let names: Vec<String> = (0..30).map(|i| format!("c{i:02}")).collect();
    let all: Vec<&str> = names.iter().map(String::as_str).collect();
    let stats = stats_of(&[(all.clone(), true), (vec!["c00"], true), (vec!["c00"], false)], 1);
    let model = ShapleyModel::fit(&stats);
    let e = model.explain_conversion(&all);
    assert_eq!(e.method, ShapleyMethod::SeenSets);
    assert!(close(e.channels[0].phi, 1.0 / 20.0, 1e-12));
    for c in &e.channels[1..] {
        assert!(close(c.phi, 1.0 / 30.0 - 1.0 / 1740.0, 1e-12));
    }
    // efficiency: sum phi = v(N) = 1
    assert!(close(e.channels.iter().map(|c| c.phi).sum::<f64>(), 1.0, 1e-12));
    // Only seen coalitions are listed: {c00} and all 30.
    assert!(!e.coalitions_complete);
    assert_eq!(e.coalitions.iter().map(|c| c.channels.len()).collect::<Vec<_>>(), vec![1, 30]);
    let credit = model.credit(&touches(&all), 0);
    assert!(close(credit.iter().sum::<f64>(), 1.0, 1e-9));
}

#[test]
fn seen_sets_pass_matches_full_enumeration_above_the_threshold() {
    // 18 distinct channels in the conversion (above the enumeration limit of
    // 16): compare with the generic exact routine over all 2^18 coalitions
    // of v as read back from the model.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
    let names: Vec<String> = (0..18).map(|i| format!("c{i:02}")).collect();
    let mut stats = PathStats::new(1);
    for _ in 0..4000 {
        let len = rng.gen_range(1..8);
        let p: Vec<&str> = (0..len).map(|_| names[rng.gen_range(0..18)].as_str()).collect();
        stats.add_path(&p, rng.gen_bool(0.35));
    }
    let model = ShapleyModel::fit(&stats);
    let all: Vec<&str> = names.iter().map(String::as_str).collect();
    let e = model.explain_conversion(&all);
    assert_eq!(e.method, ShapleyMethod::SeenSets);
    let exact = shapley_values(18, |m| {
        let s: Vec<&str> = (0..18).filter(|i| m >> i & 1 == 1).map(|i| all[i]).collect();
        if s.is_empty() {
            0.0
        } else {
            model.value(&s)
        }
    });
    let phi: Vec<f64> = e.channels.iter().map(|c| c.phi).collect();
    assert_all_close(&phi, &exact, 1e-12);
}

#[test]
fn global_values_above_twenty_channels_are_sampled_within_standard_errors() {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let names: Vec<String> = (0..24).map(|i| format!("c{i:02}")).collect();
    let mut stats = PathStats::new(1);
    for _ in 0..5000 {
        let len = rng.gen_range(1..5);
        let p: Vec<&str> = (0..len).map(|_| names[rng.gen_range(0..24)].as_str()).collect();
        stats.add_path(&p, rng.gen_bool(0.3));
    }
    let model = ShapleyModel::fit(&stats);
    let g = model.global_values(42);
    assert_eq!(g.method, ShapleyMethod::MonteCarlo);
    assert_eq!((g.seed, g.permutations), (Some(42), Some(20_000)));
    let exact = model.global_values_exact();
    for (s, x) in g.channels.iter().zip(&exact.channels) {
        let se = s.std_error.expect("sampled");
        assert!(se > 0.0);
        assert!((s.value - x.value).abs() <= 4.0 * se, "{}: {} vs {} (se {se})", s.channel, s.value, x.value);
    }
    assert_eq!(g, model.global_values(42));
}

// ------------------------------------------------ Markov: worked example

fn worked_example() -> Vec<(Vec<&'static str>, bool)> {
    vec![
        (vec!["A", "B", "C"], true),
        (vec!["A", "C"], true),
        (vec!["B", "A", "B"], false),
        (vec!["C"], true),
        (vec!["A", "B"], false),
    ]
}

#[test]
fn markov_first_order_worked_example() {
    // Removal effects on five paths in the manner of Anderl et al. 2016,
    // solved by hand as an absorbing chain (Kemeny and Snell 1960).
    //
    // Transition counts (first order):
    //   START -> A 3, -> B 1, -> C 1                  (of 5)
    //   A -> B 3 (ABC, BAB, AB), -> C 1 (AC)          (of 4)
    //   B -> C 1, -> A 1, -> NULL 2                   (of 4)
    //   C -> CONV 3                                   (of 3)
    // Absorption in CONV: x_C = 1; x_B = x_C/4 + x_A/4; x_A = 3/4 x_B + 1/4 x_C
    //   => x_A = 7/13, x_B = 5/13,
    //   P = 3/5 * 7/13 + 1/5 * 5/13 + 1/5 = 39/65 = 0.6.
    // Remove A (START->A and B->A go to NULL): x_B = 1/4, P_-A = 1/5*1/4 + 1/5 = 0.25.
    // Remove B (START->B and A->B go to NULL): x_A = 1/4, P_-B = 3/5*1/4 + 1/5 = 0.35.
    // Remove C: every conversion passes C, P_-C = 0.
    // RE = 1 - P_-c/P: A 7/12, B 5/12, C 1; sum 2; shares 7/24, 5/24, 1/2.
    let model = MarkovModel::fit(&stats_of(&worked_example(), 1));
    assert!(close(model.conversion_probability(), 0.6, 1e-12));
    assert!(close(model.conversion_probability_without("A"), 0.25, 1e-12));
    assert!(close(model.conversion_probability_without("B"), 0.35, 1e-12));
    assert!(close(model.conversion_probability_without("C"), 0.0, 1e-12));
    let re = model.removal_effects();
    assert_eq!(re.iter().map(|(c, _)| c.as_str()).collect::<Vec<_>>(), ["A", "B", "C"]);
    assert_all_close(&re.iter().map(|(_, r)| *r).collect::<Vec<_>>(), &[7.0 / 12.0, 5.0 / 12.0, 1.0], 1e-12);
    let e = model.explain_conversion(&["A", "B", "C"]);
    assert_all_close(&e.channels.iter().map(|c| c.share).collect::<Vec<_>>(), &[7.0 / 24.0, 5.0 / 24.0, 0.5], 1e-12);
    assert!(!e.fallback_linear);
    assert_eq!(model.id(), "markov");
    // Credit of A>B>C>A: A's share split over its two touches.
    let credit = model.credit(&touches(&["A", "B", "C", "A"]), 0);
    assert_all_close(&credit, &[7.0 / 48.0, 5.0 / 24.0, 0.5, 7.0 / 48.0], 1e-12);
}

#[test]
fn markov_second_order_worked_example() {
    // Same paths, second order: states are the last two channels (the first
    // state of a path holds one). Transition counts:
    //   START -> (A) 3, -> (B) 1, -> (C) 1
    //   (A) -> (A,B) 2, -> (A,C) 1         (B) -> (B,A) 1      (C) -> CONV 1
    //   (A,B) -> (B,C) 1, -> NULL 2        (B,A) -> (A,B) 1
    //   (B,C) -> CONV 1                    (A,C) -> CONV 1
    // x_(A,B) = 1/3, x_(A) = 2/3 * 1/3 + 1/3 = 5/9, x_(B) = x_(B,A) = 1/3, x_(C) = 1
    // P = 3/5 * 5/9 + 1/5 * 1/3 + 1/5 = 9/15 = 0.6.
    // Removing c redirects transitions into every state whose last channel is c:
    //   A: (A), (B,A) cut: only START->(C) converts: P_-A = 1/5, RE = 2/3.
    //   B: (B), (A,B) cut: x_(A) = 1/3: P_-B = 3/5 * 1/3 + 1/5 = 2/5, RE = 1/3.
    //   C: (C), (A,C), (B,C) cut: P_-C = 0, RE = 1.
    // Shares: (2/3, 1/3, 1) / 2 = 1/3, 1/6, 1/2.
    let stats = stats_of(&worked_example(), 2);
    let model = MarkovModel::fit(&stats);
    assert_eq!(stats.state_count(), 7);
    assert!(close(model.conversion_probability(), 0.6, 1e-12));
    assert!(close(model.conversion_probability_without("A"), 0.2, 1e-12));
    assert!(close(model.conversion_probability_without("B"), 0.4, 1e-12));
    let e = model.explain_conversion(&["A", "B", "C"]);
    assert_all_close(&e.channels.iter().map(|c| c.share).collect::<Vec<_>>(), &[1.0 / 3.0, 1.0 / 6.0, 0.5], 1e-12);
    assert_eq!(e.order, 2);
    assert!(model.model_version().starts_with("markov-o2-"));
}

// ------------------------------------------- Markov: exact rational solver

/// Independent exact implementation of docs/contract.md's `markov` (order k):
/// builds the chain from the raw paths, solves with rational Gaussian
/// elimination, removes c by dropping every transition into a state whose
/// last channel is c (the mass goes to NULL). Returns P and P_-c by channel.
fn exact_markov(paths: &[(Vec<&str>, bool)], order: usize) -> (BigRational, BTreeMap<String, BigRational>) {
    #[derive(Clone, PartialEq, Eq, PartialOrd, Ord)]
    enum N {
        Start,
        S(Vec<String>),
        Conv,
        Null,
    }
    let mut counts: BTreeMap<N, BTreeMap<N, i64>> = BTreeMap::new();
    for (p, c) in paths {
        let mut prev = N::Start;
        for j in 0..p.len() {
            let lo = (j + 1).saturating_sub(order);
            let s = N::S(p[lo..=j].iter().map(|x| x.to_string()).collect());
            *counts.entry(prev).or_default().entry(s.clone()).or_default() += 1;
            prev = s;
        }
        *counts.entry(prev).or_default().entry(if *c { N::Conv } else { N::Null }).or_default() += 1;
    }
    let transient: Vec<N> = counts.keys().cloned().collect();
    let idx: BTreeMap<N, usize> = transient.iter().cloned().enumerate().map(|(i, s)| (s, i)).collect();
    let solve = |removed: &dyn Fn(&N) -> bool| -> BigRational {
        let n = transient.len();
        let mut a = vec![vec![BigRational::zero(); n + 1]; n];
        for (i, s) in transient.iter().enumerate() {
            let row = &counts[s];
            let total: i64 = row.values().sum();
            a[i][i] += BigRational::one();
            for (t, &c) in row {
                let p = q(c, total);
                match t {
                    N::Conv => a[i][n] += p,
                    N::Null => {}
                    t if removed(t) => {}
                    t => a[i][idx[t]] -= p,
                }
            }
        }
        for k in 0..n {
            let piv = (k..n).find(|&r| !a[r][k].is_zero()).expect("I - Q is nonsingular");
            a.swap(k, piv);
            let d = a[k][k].clone();
            for x in a[k].iter_mut().skip(k) {
                *x = &*x / &d;
            }
            let pivot_row = a[k].clone();
            for (r, row) in a.iter_mut().enumerate() {
                if r != k && !row[k].is_zero() {
                    let m = row[k].clone();
                    for (x, p) in row.iter_mut().zip(&pivot_row).skip(k) {
                        *x -= &m * p;
                    }
                }
            }
        }
        a[idx[&N::Start]][n].clone()
    };
    let p = solve(&|_| false);
    let channels: BTreeSet<String> = paths.iter().flat_map(|(p, _)| p.iter().map(|c| c.to_string())).collect();
    let without = channels
        .into_iter()
        .map(|c| {
            let w = solve(&|t: &N| matches!(t, N::S(v) if v.last() == Some(&c)));
            (c, w)
        })
        .collect();
    (p, without)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    #[test]
    fn markov_float_solver_matches_exact_rational(paths in arb_paths(4, 5, 10), order in 1usize..=3) {
        let model = MarkovModel::fit(&stats_of(&paths, order));
        let (p, without) = exact_markov(&paths, order);
        prop_assert!(close(model.conversion_probability(), f(&p), 1e-9));
        for (c, w) in &without {
            prop_assert!(close(model.conversion_probability_without(c), f(w), 1e-9));
            let re = if p.is_zero() { 0.0 } else { f(&(BigRational::one() - w / &p)) };
            prop_assert!(close(model.removal_effect(c), re, 1e-9), "{c}: {} vs {re}", model.removal_effect(c));
        }
    }

    #[test]
    fn markov_p_is_the_observed_conversion_share(paths in arb_paths(5, 8, 40), order in 1usize..=4) {
        // Flow conservation: every visit to a state leaves it once, so the
        // expected visits of the fitted chain equal the observed ones and
        // P = conversions / paths exactly (for every order).
        let stats = stats_of(&paths, order);
        let model = MarkovModel::fit(&stats);
        let share = stats.conversions() as f64 / stats.paths() as f64;
        prop_assert!(close(model.conversion_probability(), share, 1e-9), "{} vs {share}", model.conversion_probability());
    }

    #[test]
    fn markov_first_order_ignores_consecutive_repeats(paths in arb_paths(4, 8, 30)) {
        // A>A>B against A>B: collapsing a repeat only removes self-loop
        // counts, and a self-loop with probability q scales the rest of its
        // row by 1/(1-q), which leaves every absorption probability (and so
        // P, P_-c, RE) unchanged. Holds for order 1 only (see the next test).
        let collapsed: Vec<(Vec<&str>, bool)> = paths
            .iter()
            .map(|(p, c)| {
                let mut q: Vec<&str> = p.clone();
                q.dedup();
                (q, *c)
            })
            .collect();
        let a = MarkovModel::fit(&stats_of(&paths, 1));
        let b = MarkovModel::fit(&stats_of(&collapsed, 1));
        prop_assert!(close(a.conversion_probability(), b.conversion_probability(), 1e-9));
        let (ra, rb) = (a.removal_effects(), b.removal_effects());
        prop_assert_eq!(ra.len(), rb.len());
        for ((ca, xa), (cb, xb)) in ra.iter().zip(&rb) {
            prop_assert_eq!(ca, cb);
            prop_assert!(close(*xa, *xb, 1e-9), "{ca}: {xa} vs {xb}");
        }
    }
}

#[test]
fn markov_second_order_is_changed_by_repeats() {
    // At order 2 collapsing repeats is not neutral. Smallest case found by
    // exhaustive search over up to three paths of length <= 3 on {A, B}:
    // A>A converting, B>A>A not converting.
    //   With repeats: START->(A) 1, (A)->(A,A) 1, START->(B) 1, (B)->(B,A) 1,
    //     (B,A)->(A,A) 1, (A,A)->CONV 1, (A,A)->NULL 1.
    //     x_(A,A) = 1/2, so x_(A) = x_(B,A) = x_(B) = 1/2 and P = 1/2.
    //     Remove B (cut START->(B)): P_-B = 1/2 * 1/2 = 1/4, RE(B) = 1/2.
    //   Collapsed (A converting, B>A not): START->(A) 1, (A)->CONV 1,
    //     START->(B) 1, (B)->(B,A) 1, (B,A)->NULL 1: x_(A) = 1, x_(B) = 0,
    //     P = 1/2, P_-B = 1/2, RE(B) = 0.
    // The repeat fills the two-channel window with A, so both paths end in
    // the same state (A,A) and pool their outcomes; collapsed, they end in
    // (A) and (B,A) and keep them apart. At order 1 there is no window to
    // forget, and the self-loop argument above applies.
    let with = stats_of(&[(vec!["A", "A"], true), (vec!["B", "A", "A"], false)], 2);
    let collapsed = stats_of(&[(vec!["A"], true), (vec!["B", "A"], false)], 2);
    let (a, b) = (MarkovModel::fit(&with), MarkovModel::fit(&collapsed));
    assert!(close(a.conversion_probability(), 0.5, 1e-12) && close(b.conversion_probability(), 0.5, 1e-12));
    assert!(close(a.removal_effect("B"), 0.5, 1e-12));
    assert!(close(b.removal_effect("B"), 0.0, 1e-12));
    // And the exact solver agrees.
    let (_, wa) = exact_markov(&[(vec!["A", "A"], true), (vec!["B", "A", "A"], false)], 2);
    assert_eq!(wa["B"], q(1, 4));
    // Order 1 on the same paths: unchanged.
    let (a1, b1) = (
        MarkovModel::fit(&stats_of(&[(vec!["A", "A"], true), (vec!["B", "A", "A"], false)], 1)),
        MarkovModel::fit(&stats_of(&[(vec!["A"], true), (vec!["B", "A"], false)], 1)),
    );
    assert!(close(a1.removal_effect("B"), b1.removal_effect("B"), 1e-12));
}

// -------------------------------------------------------- credits and API

fn arb_conversion() -> impl Strategy<Value = Vec<&'static str>> {
    prop::collection::vec(0usize..6, 1..10).prop_map(|v| v.into_iter().map(|i| NAMES[i]).collect())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(128))]

    #[test]
    fn credits_are_non_negative_and_sum_to_one(paths in arb_paths(4, 6, 25), conv in arb_conversion(), order in 1usize..=4) {
        // Channels 4 and 5 never appear in the statistics: unseen channels,
        // all-zero values and negative Shapley values all occur here.
        let stats = stats_of(&paths, order);
        let models: [Box<dyn Model>; 2] = [Box::new(ShapleyModel::fit(&stats)), Box::new(MarkovModel::fit(&stats))];
        let path = touches(&conv);
        for m in &models {
            let c = m.credit(&path, 0);
            prop_assert_eq!(c.len(), path.len());
            prop_assert!(c.iter().all(|x| *x >= 0.0 && x.is_finite()), "{}: {c:?}", m.id());
            prop_assert!(close(c.iter().sum::<f64>(), 1.0, 1e-9), "{}: {c:?}", m.id());
        }
    }
}

#[test]
fn clamping_and_linear_fallback() {
    // Shapley: "social" lowers the rate (v({email}) = 1, v({email, social}) = 0),
    // so its phi is negative and is clamped to 0:
    // phi(email) = 1/2 (1 - 0) + 1/2 (0 - 0) = 1/2, phi(social) = 1/2 (0 - 1) = -1/2.
    let stats = stats_of(&[(vec!["email"], true), (vec!["email", "social"], false)], 1);
    let s = ShapleyModel::fit(&stats);
    let e = s.explain_conversion(&["email", "social"]);
    assert_all_close(&[e.channels[0].phi, e.channels[1].phi], &[0.5, -0.5], 1e-12);
    assert_eq!(e.channels[1].phi_clamped, 0.0);
    assert_all_close(&[e.channels[0].share, e.channels[1].share], &[1.0, 0.0], 0.0);
    assert_eq!(s.credit(&touches(&["social", "email", "social"]), 0), vec![0.0, 1.0, 0.0]);
    // Nothing positive (channels never seen): linear over distinct channels,
    // split over touches.
    let e = s.explain_conversion(&["display", "affiliate"]);
    assert!(e.fallback_linear);
    assert_eq!(s.credit(&touches(&["display", "affiliate", "display"]), 0), vec![0.25, 0.5, 0.25]);

    // Markov with no conversion at all: P = 0, every RE = 0, linear.
    let m = MarkovModel::fit(&stats_of(&[(vec!["email", "social"], false)], 1));
    assert_eq!(m.conversion_probability(), 0.0);
    let e = m.explain_conversion(&["email", "social"]);
    assert!(e.fallback_linear);
    assert_eq!(m.credit(&touches(&["email", "social", "social"]), 0), vec![0.5, 0.25, 0.25]);
}

#[test]
fn stats_merge_fingerprint_and_serde() {
    let paths = worked_example();
    for order in 1..=4 {
        let whole = stats_of(&paths, order);
        // Reverse insertion order: same statistics, same fingerprint.
        let mut rev = PathStats::new(order);
        for (p, c) in paths.iter().rev() {
            rev.add_path(p, *c);
        }
        assert_eq!(whole, rev);
        assert_eq!(whole.fingerprint(), rev.fingerprint());
        // Merge of two halves equals the whole.
        let mut a = stats_of(&paths[3..], order);
        a.merge(&stats_of(&paths[..3], order));
        assert_eq!(a, whole);
        assert_eq!(a.fingerprint(), whole.fingerprint());
        // Serde round trip.
        let json = serde_json::to_string(&whole).unwrap();
        let back: PathStats = serde_json::from_str(&json).unwrap();
        assert_eq!(back, whole);
        assert_eq!(back.fingerprint(), whole.fingerprint());
        assert_eq!(serde_json::to_string(&back).unwrap(), json);
        assert_eq!((whole.paths(), whole.conversions(), whole.markov_order()), (5, 3, order));
    }
    // Different counts or orders, different fingerprints; one more path changes it.
    let f1 = stats_of(&paths, 1).fingerprint();
    assert_ne!(f1, stats_of(&paths, 2).fingerprint());
    let mut more = stats_of(&paths, 1);
    more.add_path(&["A"], false);
    assert_ne!(f1, more.fingerprint());
    assert_eq!(f1.len(), 64);
    // Orders must agree to merge.
    let mut one = PathStats::new(1);
    assert_eq!(one.try_merge(&PathStats::new(2)), Err(StatsError::OrderMismatch { ours: 1, theirs: 2 }));
    assert_eq!(PathStats::default(), PathStats::new(1));
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    #[test]
    fn fingerprint_ignores_insertion_order_and_splits(paths in arb_paths(5, 6, 30), seed in any::<u64>(), cut in 0usize..30, order in 1usize..=4) {
        let whole = stats_of(&paths, order);
        let mut shuffled = paths.clone();
        {
            use rand::seq::SliceRandom;
            shuffled.shuffle(&mut rand_chacha::ChaCha8Rng::seed_from_u64(seed));
        }
        let cut = cut.min(shuffled.len());
        let mut merged = stats_of(&shuffled[..cut], order);
        merged.merge(&stats_of(&shuffled[cut..], order));
        prop_assert_eq!(&merged, &whole);
        prop_assert_eq!(merged.fingerprint(), whole.fingerprint());
        // Fitted models of equal statistics are identical, version included.
        let (a, b) = (MarkovModel::fit(&merged), MarkovModel::fit(&whole));
        prop_assert_eq!(a.model_version(), b.model_version());
        prop_assert_eq!(a.removal_effects(), b.removal_effects());
        let (a, b) = (ShapleyModel::fit(&merged), ShapleyModel::fit(&whole));
        prop_assert_eq!(a.explain_conversion(&["email", "social", "display"]), b.explain_conversion(&["email", "social", "display"]));
    }
}

#[test]
fn model_names_versions_and_threads() {
    fn send_sync<T: Send + Sync>() {}
    send_sync::<ShapleyModel>();
    send_sync::<MarkovModel>();
    let stats = stats_of(&worked_example(), 3);
    let fp = stats.fingerprint();
    let s = ShapleyModel::fit(&stats);
    let m = MarkovModel::fit(&stats);
    assert_eq!(s.id(), "shapley");
    assert_eq!(Model::version(&s), Some(format!("shapley-{}", &fp[..16]).as_str()));
    assert_eq!(Model::version(&m), Some(format!("markov-o3-{}", &fp[..16]).as_str()));
    // Explanations print as JSON.
    let js = serde_json::to_value(s.explain_conversion(&["A", "B"])).unwrap();
    assert_eq!(js["coalitions"].as_array().unwrap().len(), 4);
    let js = serde_json::to_value(m.explain_conversion(&["A", "B"])).unwrap();
    assert_eq!(js["channels"][0]["channel"], "A");
    assert_eq!(js["solver"]["method"], "dense_lu");
}

#[test]
fn empty_statistics_fit_and_credit_linearly() {
    // No path yet (a fresh `serve`): both models fit, P = 0, credit is linear.
    let stats = PathStats::new(1);
    let (s, m) = (ShapleyModel::fit(&stats), MarkovModel::fit(&stats));
    assert_eq!(m.conversion_probability(), 0.0);
    assert!(m.removal_effects().is_empty());
    assert!(s.global_values(0).channels.is_empty());
    for model in [&s as &dyn Model, &m as &dyn Model] {
        assert_eq!(model.credit(&touches(&["email", "social"]), 0), vec![0.5, 0.5]);
    }
    let e = s.explain_conversion(&["email", "email", "social"]);
    assert_eq!(e.channels.len(), 2);
    assert!(e.fallback_linear);
}

#[test]
fn fingerprint_is_sha256_of_the_documented_encoding() {
    // Recomputes the digest from the byte layout documented on
    // `PathStats::fingerprint` (SHA-256 per FIPS 180-4, via the sha2 crate),
    // for one converting path "A" at order 1.
    use sha2::{Digest, Sha256};
    let u = |x: u64| x.to_le_bytes().to_vec();
    let list = |names: &[&str]| {
        let mut b = u(names.len() as u64);
        for n in names {
            b.extend(u(n.len() as u64));
            b.extend(n.as_bytes());
        }
        b
    };
    let mut bytes = b"apportion.path-stats.v1\0".to_vec();
    bytes.extend([u(1), u(1), u(1)].concat()); // order, paths, conversions
    bytes.extend(u(1)); // one channel set
    bytes.extend(list(&["A"]));
    bytes.extend([u(1), u(0)].concat());
    bytes.extend(u(2)); // two transitions: START -> (A), (A) -> CONVERSION
    bytes.push(0);
    bytes.push(1);
    bytes.extend(list(&["A"]));
    bytes.extend(u(1));
    bytes.push(1);
    bytes.extend(list(&["A"]));
    bytes.push(2);
    bytes.extend(u(1));
    let want = hex::encode(Sha256::digest(&bytes));
    assert_eq!(stats_of(&[(vec!["A"], true)], 1).fingerprint(), want);
}

// ------------------------------------------- channel cap and overflow bucket

fn capped(paths: &[(Vec<&str>, bool)], order: usize, cap: usize) -> PathStats {
    let mut s = PathStats::new(order).with_max_channels(Some(cap));
    for (p, c) in paths {
        s.add_path(p, *c);
    }
    s
}

/// The paths with every channel outside `keep` renamed to the bucket.
fn renamed<'a>(paths: &[(Vec<&'a str>, bool)], keep: &BTreeSet<&str>) -> Vec<(Vec<&'a str>, bool)> {
    paths
        .iter()
        .map(|(p, c)| (p.iter().map(|x| if keep.contains(x) { *x } else { OVERFLOW_CHANNEL }).collect(), *c))
        .collect()
}

#[test]
fn the_channel_after_the_cap_goes_to_the_overflow_bucket() {
    // docs/contract.md, "Models", Channel cap (derived by hand): cap 2.
    let mut s = PathStats::new(1).with_max_channels(Some(2));
    assert_eq!(s.add_path(&["b"], true), 0);
    assert_eq!(s.add_path(&["c"], false), 0);
    // The third channel, "d", sorts after both kept ones: the bucket.
    assert_eq!(s.add_path(&["d", "b", "d"], true), 2);
    assert_eq!(s.channels(), vec![OVERFLOW_CHANNEL, "b", "c"]);
    assert_eq!(s.set_outcomes(&["b", OVERFLOW_CHANNEL]), Outcomes { conversions: 1, non_conversions: 0 });
    assert_eq!(s.set_outcomes(&["d", "b"]), Outcomes::default());
    // "a" sorts before "c": "a" is kept and "c" (and its path) moves to the bucket.
    assert_eq!(s.add_path(&["a"], false), 0);
    assert_eq!(s.channels(), vec![OVERFLOW_CHANNEL, "a", "b"]);
    assert_eq!(s.set_outcomes(&[OVERFLOW_CHANNEL]), Outcomes { conversions: 0, non_conversions: 1 });
    assert_eq!(s.channel_count(), 3);
    // The same as counting the renamed paths without a cap, and as counting
    // them in the opposite order with the cap.
    let paths = vec![(vec!["b"], true), (vec!["c"], false), (vec!["d", "b", "d"], true), (vec!["a"], false)];
    let keep: BTreeSet<&str> = ["a", "b"].into();
    assert_eq!(s, stats_of(&renamed(&paths, &keep), 1));
    let rev: Vec<_> = paths.iter().rev().cloned().collect();
    assert_eq!(s, capped(&rev, 1, 2));
    // A lower cap applied later moves the largest kept name too.
    let lower = s.clone().with_max_channels(Some(1));
    assert_eq!(lower.channels(), vec![OVERFLOW_CHANNEL, "a"]);
    assert_eq!(lower, stats_of(&renamed(&paths, &["a"].into()), 1));
}

#[test]
fn overflowed_touches_are_credited_through_the_bucket() {
    // Cap 1: "a" is kept; "x" and "y" share the bucket O. Statistics:
    // [a, x] converted, [y] not (derived by hand).
    let stats = capped(&[(vec!["a", "x"], true), (vec!["y"], false)], 1, 1);
    let path = touches(&["a", "x", "y"]);
    // Shapley (Shapley 1953, two players a and O): v({a}) = 0 (never seen
    // alone), v({O}) = 0/1 = 0, v({a, O}) = 1/1 = 1, so phi(a) = phi(O) =
    // 1/2 (1 - 0) = 1/2; O's half is split over its two touches.
    let s = ShapleyModel::fit(&stats);
    assert_eq!(s.bucket("x"), OVERFLOW_CHANNEL);
    assert_all_close(&s.credit(&path, 0), &[0.5, 0.25, 0.25], 1e-12);
    let e = s.explain_conversion(&["a", "x", "y"]);
    assert_eq!(e.channels.len(), 2);
    assert_eq!(e.channels[1].channel, OVERFLOW_CHANNEL);
    // Markov, order 1 (removal effect, Anderl et al. 2016; solved by hand):
    // START -> a 1/2, START -> O 1/2, a -> O 1, O -> CONV 1/2, O -> NULL 1/2.
    // P = 1/2 * 1 * 1/2 + 1/2 * 1/2 = 1/2; without a: P = 1/4, RE(a) = 1/2;
    // without O: P = 0, RE(O) = 1. Shares 1/3 and 2/3; O's over 2 touches.
    let m = MarkovModel::fit(&stats);
    assert!(close(m.conversion_probability(), 0.5, 1e-12));
    assert!(close(m.removal_effect("a"), 0.5, 1e-12));
    assert!(close(m.removal_effect(OVERFLOW_CHANNEL), 1.0, 1e-12));
    assert_all_close(&m.credit(&path, 0), &[1.0 / 3.0, 1.0 / 3.0, 1.0 / 3.0], 1e-12);
    // A channel never seen that sorts before the largest kept one would have
    // been kept, not bucketed: it stays an unseen channel (value 0).
    assert_eq!(m.bucket("Z"), "Z");
    assert_eq!(s.bucket("zz"), OVERFLOW_CHANNEL);
    // Without the cap the same counts credit "x" and "y" as unseen channels.
    let uncapped = stats.clone().with_max_channels(None);
    assert_eq!(ShapleyModel::fit(&uncapped).bucket("zz"), "zz");
}

fn arb_many_paths() -> impl Strategy<Value = Vec<(Vec<&'static str>, bool)>> {
    // 10 names, so that small caps overflow and names arrive in any order.
    const MANY: [&str; 10] = ["j", "i", "h", "g", "f", "e", "d", "c", "b", "a"];
    prop::collection::vec((prop::collection::vec(0usize..10, 1..=6), any::<bool>()), 1..=30)
        .prop_map(|v| v.into_iter().map(|(p, c)| (p.into_iter().map(|i| MANY[i]).collect(), c)).collect())
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    /// Capped statistics equal the uncapped statistics of the paths with
    /// every channel but the `cap` smallest names renamed to the bucket
    /// (module docs of stats.rs), whatever the order of the paths and
    /// however they are split and merged (serve's partitions, replay's one
    /// pass); credit still sums to 1 per conversion.
    #[test]
    fn capped_statistics_are_the_renamed_paths(
        paths in arb_many_paths(),
        cap in 1usize..6,
        order in 1usize..=3,
        cut in 0usize..30,
        conv in prop::collection::vec(0usize..10, 1..8),
    ) {
        let names: BTreeSet<&str> = paths.iter().flat_map(|(p, _)| p.iter().copied()).collect();
        let keep: BTreeSet<&str> = names.iter().copied().take(cap).collect();
        let want = stats_of(&renamed(&paths, &keep), order);
        let whole = capped(&paths, order, cap);
        prop_assert_eq!(&whole, &want);
        let cut = cut.min(paths.len());
        let mut merged = capped(&paths[cut..], order, cap);
        merged.merge(&capped(&paths[..cut], order, cap));
        prop_assert_eq!(&merged, &want);
        prop_assert_eq!(merged.fingerprint(), whole.fingerprint());
        prop_assert!(whole.channel_count() <= cap + 1);
        let path = touches(&conv.iter().map(|&i| ["a", "b", "c", "d", "e", "f", "g", "h", "i", "j", "k"][i]).collect::<Vec<_>>());
        let models: [Box<dyn Model>; 2] = [Box::new(ShapleyModel::fit(&whole)), Box::new(MarkovModel::fit(&whole))];
        for m in &models {
            let c = m.credit(&path, 0);
            prop_assert!(c.iter().all(|x| *x >= 0.0 && x.is_finite()), "{}: {c:?}", m.id());
            prop_assert!(close(c.iter().sum::<f64>(), 1.0, 1e-9), "{}: {c:?}", m.id());
        }
    }

    /// A tracked delta after each cut carries the changed counters: applied
    /// over the previous ones (a full delta replacing them all) they give
    /// every counter of the statistics (what the store writes per commit).
    #[test]
    fn deltas_rebuild_the_counters(paths in arb_many_paths(), cap in 1usize..12, order in 1usize..=3, cuts in prop::collection::vec(any::<bool>(), 30)) {
        let mut s = PathStats::new(order).with_max_channels(Some(cap));
        s.track_changes();
        let mut stored: BTreeMap<String, Counter> = BTreeMap::new();
        let key = |c: &Counter| match c {
            Counter::Set { channels, .. } => format!("s{channels:?}"),
            Counter::Transition { from, to, .. } => format!("t{from:?}{to:?}"),
        };
        for (i, (p, c)) in paths.iter().enumerate() {
            s.add_path(p, *c);
            if cuts[i] || i + 1 == paths.len() {
                let d = s.take_delta();
                if d.full {
                    stored.clear();
                }
                for c in d.counters {
                    stored.insert(key(&c), c);
                }
            }
        }
        let back = PathStats::from_counters(order, s.paths(), s.conversions(), stored.into_values()).unwrap();
        prop_assert_eq!(&back, &capped(&paths, order, cap));
        prop_assert!(s.take_delta().is_empty());
    }
}
