//! The bootstrap against the ground-truth simulator (known channel effects).

use apportion_report::bootstrap::{bootstrap, BootstrapOptions, BootstrapResult, ShareInterval};

use crate::support::simulated_paths;

fn interval<'a>(r: &'a BootstrapResult, channel: &str, model: &str) -> &'a ShareInterval {
    let ch = r.channels.iter().find(|c| c.channel == channel).unwrap_or_else(|| panic!("{channel}"));
    ch.models.iter().find(|m| m.model == model).unwrap()
}

/// Same paths and seed, same intervals: whatever the number of threads and
/// the order of the paths. Another seed moves the intervals, not the points.
#[test]
fn reproducible_with_a_seed() {
    let (_, paths) = simulated_paths(800, 3);
    let o = BootstrapOptions { resamples: 40, seed: 11, threads: 1, ..Default::default() };
    let a = bootstrap(&paths, &o).unwrap();
    for threads in [2, 7] {
        assert_eq!(a, bootstrap(&paths, &BootstrapOptions { threads, ..o.clone() }).unwrap(), "{threads} threads");
    }
    let mut reversed = paths.clone();
    reversed.reverse();
    assert_eq!(a, bootstrap(&reversed, &o).unwrap(), "path order");
    let b = bootstrap(&paths, &BootstrapOptions { seed: 12, ..o }).unwrap();
    assert_ne!(a, b);
    for (x, y) in a.channels.iter().zip(&b.channels) {
        for (p, q) in x.models.iter().zip(&y.models) {
            assert_eq!(p.point, q.point, "the point estimate does not resample");
            assert!(p.low <= p.point.max(p.low) && p.low <= p.high);
        }
    }
}

/// In the simulator the channel with the largest true incremental
/// conversions gets a `shapley` share whose 90 % interval excludes the
/// share of every channel that does nothing (true effect 0,
/// load/README.md).
///
/// `markov` is not held to this: on this scenario it gives the most-shown
/// do-nothing channel (`social`) about the share of the strongest channel
/// (load/RESULTS.md, "Share of credit per channel": 0.232 and 0.229 at
/// 50 000 users), so its intervals overlap there whatever the sample size.
/// The intervals measure the stability of a fit, not its truth; the test
/// prints markov's numbers for the record.
#[test]
fn strongest_channel_interval_excludes_do_nothing_channels() {
    let (truth, paths) = simulated_paths(6000, 17);
    let strongest =
        truth.channels.iter().max_by(|a, b| a.incremental_conversions.total_cmp(&b.incremental_conversions)).unwrap();
    let nulls: Vec<&str> = truth.channels.iter().filter(|c| c.does_nothing).map(|c| c.channel.as_str()).collect();
    assert_eq!(nulls, ["social", "display", "push"]);
    let r = bootstrap(&paths, &BootstrapOptions { resamples: 100, seed: 5, ..Default::default() }).unwrap();
    let s = interval(&r, &strongest.channel, "shapley");
    for n in &nulls {
        let share = interval(&r, n, "shapley").point;
        assert!(
            share < s.low || share > s.high,
            "shapley: {n} ({share}) inside {}'s interval {s:?}",
            strongest.channel
        );
        let (m, ms) = (interval(&r, &strongest.channel, "markov"), interval(&r, n, "markov").point);
        eprintln!(
            "{}: shapley [{:.4}, {:.4}] vs {n} {share:.4}; markov [{:.4}, {:.4}] vs {n} {ms:.4}",
            strongest.channel, s.low, s.high, m.low, m.high
        );
    }
}

/// Thirty paths leave the fit far less certain than thirty thousand: every
/// channel's interval is wider under both models, and the mean width is
/// more than 5 times larger (the spread of an estimate from n independent
/// draws shrinks like 1/sqrt(n); Efron and Tibshirani 1993, ch. 2 and 5).
#[test]
fn thirty_paths_give_wider_intervals_than_thirty_thousand() {
    let run = |users: u64| {
        let (_, paths) = simulated_paths(users, 8);
        assert_eq!(paths.len() as u64, users, "one journey, one path per simulated user");
        bootstrap(&paths, &BootstrapOptions { resamples: 40, seed: 9, ..Default::default() }).unwrap()
    };
    let (small, large) = (run(30), run(30_000));
    let mean = |r: &BootstrapResult| {
        let ws: Vec<f64> = r.channels.iter().flat_map(|c| c.models.iter().map(|m| m.high - m.low)).collect();
        ws.iter().sum::<f64>() / ws.len() as f64
    };
    assert!(small.channels.len() >= 5, "the 30 paths touch most channels");
    for c in &small.channels {
        for m in &c.models {
            let big = interval(&large, &c.channel, &m.model);
            assert!(m.high - m.low > big.high - big.low, "{} {}: {m:?} vs {big:?}", c.channel, m.model);
        }
    }
    let (ws, wl) = (mean(&small), mean(&large));
    eprintln!("mean 90 % interval width: 30 paths {ws:.4}, 30 000 paths {wl:.4}");
    assert!(ws > 5.0 * wl, "30 paths: {ws}, 30 000 paths: {wl}");
}
