//! Data-driven model benchmarks.
//!
//! Run: `cargo bench -p apportion-engine --bench datadriven -- --sample-size 10`
//! Targets (the project's own orientation figures, load/RESULTS.md): exact global Shapley with 16 channels over 1M
//! paths (fit + global values) under 1 s; a first-order Markov fit with 200
//! channels (every removal effect included) under 1 s.
//!
//! The paths are synthetic (seeded ChaCha8): lengths 1..=6, channels drawn
//! with a skewed distribution, conversion odds rising with the channels on
//! the path, so that most of the 2^16 channel sets occur.

use apportion_engine::datadriven::{MarkovModel, PathStats, ShapleyModel};
use criterion::{black_box, criterion_group, criterion_main, Criterion};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn paths(channels: usize, n: usize, seed: u64) -> (Vec<String>, Vec<(Vec<u16>, bool)>) {
    let names: Vec<String> = (0..channels).map(|i| format!("channel_{i:03}")).collect();
    let lift: Vec<f64> = (0..channels).map(|i| 0.02 + 0.1 * ((i * 7) % 11) as f64 / 11.0).collect();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let out = (0..n)
        .map(|_| {
            let len = rng.gen_range(1..=6);
            let p: Vec<u16> = (0..len)
                .map(|_| {
                    let u: f64 = rng.gen();
                    ((u * u * channels as f64) as usize).min(channels - 1) as u16
                })
                .collect();
            let odds: f64 = p.iter().map(|&c| lift[c as usize]).sum::<f64>().min(0.9);
            let conv = rng.gen_bool(odds);
            (p, conv)
        })
        .collect();
    (names, out)
}

fn build(names: &[String], paths: &[(Vec<u16>, bool)], order: usize) -> PathStats {
    let mut s = PathStats::new(order);
    let mut buf: Vec<&str> = Vec::new();
    for (p, c) in paths {
        buf.clear();
        buf.extend(p.iter().map(|&i| names[i as usize].as_str()));
        s.add_path(&buf, *c);
    }
    s
}

fn bench(c: &mut Criterion) {
    let (names16, paths16) = paths(16, 1_000_000, 1);
    let stats16 = build(&names16, &paths16, 1);
    eprintln!(
        "16 channels: {} paths, {} conversions, {} channel sets, {} states",
        stats16.paths(),
        stats16.conversions(),
        stats16.channel_set_count(),
        stats16.state_count()
    );
    c.bench_function("stats_add_1m_paths_16ch", |b| b.iter(|| black_box(build(&names16, &paths16, 1))));
    c.bench_function("shapley_fit_global_exact_16ch_1m_paths", |b| {
        b.iter(|| {
            let m = ShapleyModel::fit(black_box(&stats16));
            black_box(m.global_values(0))
        })
    });
    let model16 = ShapleyModel::fit(&stats16);
    let conv: Vec<&str> = names16[..5].iter().map(String::as_str).collect();
    c.bench_function("shapley_explain_5_channels", |b| {
        b.iter(|| black_box(model16.explain_conversion(black_box(&conv))))
    });

    let (names200, paths200) = paths(200, 200_000, 2);
    let stats200 = build(&names200, &paths200, 1);
    eprintln!(
        "200 channels: {} paths, {} channel sets, {} states",
        stats200.paths(),
        stats200.channel_set_count(),
        stats200.state_count()
    );
    c.bench_function("stats_fingerprint_200ch", |b| b.iter(|| black_box(stats200.fingerprint())));
    c.bench_function("markov_fit_200ch_order1", |b| b.iter(|| black_box(MarkovModel::fit(black_box(&stats200)))));
    c.bench_function("shapley_fit_global_sampled_200ch", |b| {
        b.iter(|| black_box(ShapleyModel::fit(black_box(&stats200)).global_values(0)))
    });

    let (names1k, paths1k) = paths(1000, 300_000, 4);
    let stats1k = build(&names1k, &paths1k, 1);
    eprintln!("1000 channels: solver {:?}", MarkovModel::fit(&stats1k).solve_report());
    c.bench_function("markov_fit_1000ch_order1", |b| b.iter(|| black_box(MarkovModel::fit(black_box(&stats1k)))));

    let (names20, paths20) = paths(20, 200_000, 3);
    let stats20o2 = build(&names20, &paths20, 2);
    eprintln!("20 channels order 2: {} states", stats20o2.state_count());
    c.bench_function("markov_fit_20ch_order2", |b| b.iter(|| black_box(MarkovModel::fit(black_box(&stats20o2)))));
    let stats20o3 = build(&names20, &paths20, 3);
    let m = MarkovModel::fit(&stats20o3);
    eprintln!("20 channels order 3: {} states, solver {:?}", stats20o3.state_count(), m.solve_report());
    c.bench_function("markov_fit_20ch_order3", |b| b.iter(|| black_box(MarkovModel::fit(black_box(&stats20o3)))));
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(10);
    targets = bench
}
criterion_main!(benches);
