//! Lift tests against a simulated experiment with a known true lift.

use std::io::Write;

use apportion_engine::contract::time::format_ms;
use apportion_load::lift::simulated_lift;
use apportion_load::scenario::Scenario;
use apportion_report::{build_report, ReportInputs};

use crate::support::{ndjson, simulated};

/// The 95th percentile of the standard normal distribution (from memory;
/// any normal table): a two-sided 90 % interval is ± 1.6449 standard errors.
const Z: f64 = 1.644_853_626_951_472_2;

/// Experiments on three channels of the simulator (one that works well,
/// one that works less, one that does nothing but is targeted at buyers),
/// each with its true lift and the standard error of an idealized
/// experiment (apportion-load's `lift` module), written to an experiments
/// file and read back. The test works out by itself, from the credit rows,
/// which models credit a channel outside its experiment's interval; the
/// report must flag exactly those.
#[test]
fn report_flags_exactly_the_models_outside_the_interval() {
    let sim = simulated(4000, 13);
    let scenario = Scenario::example_shop();
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("experiments.csv");
    let mut f = std::fs::File::create(&file).unwrap();
    writeln!(f, "# simulated experiments (apportion-load, seed 13)").unwrap();
    writeln!(f, "channel,start,end,incremental_conversions,std_error,low,high,source").unwrap();
    let channels = ["paid_search", "email", "push"];
    let mut lifts = Vec::new();
    for c in channels {
        let l = simulated_lift(&scenario, &sim.opts, c).unwrap();
        writeln!(
            f,
            "{c},{},{},{},{},,,\"simulated, idealized experiment, {} exposed users\"",
            format_ms(l.start_ms),
            format_ms(l.end_ms),
            l.incremental_conversions,
            l.std_error,
            l.exposed_users
        )
        .unwrap();
        lifts.push(l);
    }
    drop(f);
    let credits = dir.path().join("credit.ndjson");
    std::fs::write(&credits, ndjson(&sim.replay.rows)).unwrap();
    let report =
        build_report(&ReportInputs { credits: vec![credits], experiments: Some(file), ..Default::default() }).unwrap();
    let checks = &report.comparison.lift_tests;
    assert_eq!(checks.len(), channels.len());
    let (mut inside, mut outside) = (0, 0);
    for (l, check) in lifts.iter().zip(checks) {
        assert_eq!(check.channel, l.channel);
        let (low, high) = (l.incremental_conversions - Z * l.std_error, l.incremental_conversions + Z * l.std_error);
        assert!((check.low - low).abs() < 1e-9 && (check.high - high).abs() < 1e-9);
        assert_eq!(check.conversions_in_period, sim.truth.conversions);
        for m in &check.models {
            // Independently of the report: the model's credit to the
            // channel over the conversions in the period, from the rows.
            let credited: f64 = sim
                .replay
                .rows
                .iter()
                .filter(|r| r.model.as_str() == m.model && r.channel == l.channel)
                .filter(|r| {
                    let t = r.conversion_timestamp.ms();
                    l.start_ms <= t && t < l.end_ms
                })
                .map(|r| r.credit)
                .sum();
            let out = credited < low || credited > high;
            eprintln!(
                "{} {}: credited {credited:.1}, true {:.1} [{low:.1}, {high:.1}] {}",
                l.channel,
                m.model,
                l.incremental_conversions,
                if out { "outside" } else { "inside" }
            );
            assert!((m.credited - credited).abs() < 1e-6, "{} {}", l.channel, m.model);
            assert_eq!(m.outside, out, "{} {}: {credited} against [{low}, {high}]", l.channel, m.model);
            if out {
                outside += 1;
            } else {
                inside += 1;
            }
        }
    }
    // The check discriminates: some models fall inside, some outside.
    assert!(inside > 0 && outside > 0, "inside {inside}, outside {outside}");
    // push does nothing (true lift 0) but is sent late in the journeys of
    // users who would buy anyway (load/README.md): last_touch credits it
    // far above the experiment's interval.
    let push_last = checks[2].models.iter().find(|m| m.model == "last_touch").unwrap();
    assert!(push_last.outside && push_last.side == apportion_report::lift::Side::Above);
}
