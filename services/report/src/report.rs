//! The whole report: the comparison, the bootstrap (with `--paths`), the
//! lift checks (with `--experiments`), notes about this input, and the
//! cautions every report carries.
//!
//! The JSON form of [`Report`] is the reference: the other formats render
//! the same numbers, and the HTML tables name, for each number, the JSON
//! pointer of the value they show.

use std::collections::BTreeSet;
use std::path::PathBuf;

use serde::Serialize;

use crate::bootstrap::{bootstrap, BootstrapOptions, BootstrapResult};
use crate::compare::{CompareOptions, Comparison, ComparisonResult, GroupBy, UNATTRIBUTED};
use crate::lift::read_experiments;
use crate::rows::{group_by_conversion, read_credit, read_paths, CreditRecord};
use crate::ReportError;

/// Version of the report's JSON layout.
pub const FORMAT_VERSION: u32 = 1;

/// The cautions every report shows.
pub const CAUTIONS: [&str; 3] = [
    "Credit is correlational, not causal. Every model here, the data-driven ones included, describes how touches \
     and conversions occur together in observed journeys. Credit is not proof that a channel caused a conversion or \
     that spending more on it would bring more (incrementality); channels shown to people who would have converted \
     anyway get credit they did not earn. Controlled experiments (holdouts, geo tests) measure lift; the lift-test \
     section puts model credit beside such measurements.",
    "This report is made from personal data. The credit and path rows describe people's behaviour under \
     pseudonymous keys; the report itself holds only totals per channel or campaign, but pseudonymous data is still \
     personal data under many laws, and small groups can point to individuals. Check the legal basis, consent, \
     retention and sharing rules that apply to you with your own counsel before you use or pass on this report, and \
     follow your local law and licensed advice over anything written here.",
    "Choosing a model is a decision this report informs but does not make: no model here is calibrated or adjusted \
     to fit an experiment or another model. The comparison is shown; the user decides.",
];

/// The limits of the bootstrap, shown beside its intervals.
pub const BOOTSTRAP_LIMITS: &str = "Paths are resampled, not users: a user's several paths, and paths that are not \
     independent of each other, count as independent draws, so the intervals can be too narrow. An interval shows how \
     much the fitted share moves with data like this (the stability of the fit); it does not show whether the credit \
     is causal, and it cannot reveal bias that targeting or selection puts in observational credit. A percentile \
     interval from a finite number of resamples is itself an estimate: its ends move a little with the seed.";

/// What `apportion compare` reads and how.
#[derive(Debug, Clone, Default)]
pub struct ReportInputs {
    /// Credit rows: files or directories (see [`crate::rows`]).
    pub credits: Vec<PathBuf>,
    /// Path rows for the bootstrap (none: no bootstrap).
    pub paths: Vec<PathBuf>,
    /// The experiments file (none: no lift checks).
    pub experiments: Option<PathBuf>,
    /// Group by channel or campaign.
    pub by: GroupBy,
    /// Baseline model (default: see [`CompareOptions::baseline`]).
    pub baseline: Option<String>,
    /// Bootstrap settings; its `markov_order` is used when neither
    /// `markov_order` below nor the rows say otherwise.
    pub bootstrap: BootstrapOptions,
    /// Markov order of the refit; default: the order named in the `markov`
    /// rows' `model_version` (`markov-o<k>-...`), else 1.
    pub markov_order: Option<usize>,
}

/// The report (module docs).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Report {
    /// Version of this JSON layout.
    pub format_version: u32,
    /// Totals, differences, shift matrices and lift checks.
    #[serde(flatten)]
    pub comparison: ComparisonResult,
    /// Intervals of the data-driven models' channel shares (with paths).
    pub bootstrap: Option<BootstrapResult>,
    /// The bootstrap's limits, in words (with paths).
    pub bootstrap_limits: Option<String>,
    /// What to know about this input (mixed currencies, missing rows, ...).
    pub notes: Vec<String>,
    /// The cautions every report carries.
    pub cautions: Vec<String>,
}

/// Markov orders named by the `markov` rows' `model_version`s.
fn markov_orders(rows: &[CreditRecord]) -> BTreeSet<usize> {
    rows.iter()
        .filter(|r| r.model == "markov")
        .filter_map(|r| r.model_version.as_deref()?.strip_prefix("markov-o")?.split('-').next()?.parse().ok())
        .collect()
}

impl Report {
    /// Puts a comparison and an optional bootstrap together, adding the
    /// credit-row shares to the bootstrap, the notes and the cautions.
    pub fn new(comparison: ComparisonResult, mut bootstrap: Option<BootstrapResult>) -> Report {
        let c = &comparison;
        let mut notes = Vec::new();
        if c.currencies.len() > 1 {
            notes.push(format!(
                "Values come in several currencies ({}) and are added here as plain numbers: compare conversions, or \
                 split the rows by currency first.",
                c.currencies.join(", ")
            ));
        }
        if c.goals.len() > 1 {
            let goals: Vec<String> = c.goals.iter().map(|(g, n)| format!("{g} ({n})")).collect();
            notes.push(format!("Conversions of several goals are counted together: {}.", goals.join(", ")));
        }
        for t in &c.model_totals {
            if t.conversions < c.conversions {
                notes.push(format!(
                    "{} has rows for {} of the {} conversions; its totals and shifts cover those only.",
                    t.model, t.conversions, c.conversions
                ));
            }
        }
        let refitted: Vec<String> = c
            .model_totals
            .iter()
            .filter(|t| t.snapshots > 1)
            .map(|t| format!("{} ({})", t.model, t.snapshots))
            .collect();
        if !refitted.is_empty() {
            notes.push(format!(
                "The rows of {} come from several fitted snapshots (the models were refitted while crediting, as \
                 serve does); the bootstrap's point values come from one fit on all the paths given and can differ \
                 from the rows' shares.",
                refitted.join(" and ")
            ));
        }
        for l in &c.lift_tests {
            if !l.channel_seen {
                notes.push(format!(
                    "Experiment on line {} names channel {:?}, which no credit row in its period has: every model \
                     credits it 0 there.",
                    l.line, l.channel
                ));
            }
        }
        if let Some(b) = bootstrap.as_mut() {
            if c.by == GroupBy::Channel {
                for ch in &mut b.channels {
                    for m in &mut ch.models {
                        let Some(mi) = c.models.iter().position(|x| *x == m.model) else { continue };
                        let attributed: f64 =
                            c.rows.iter().filter(|r| r.key != UNATTRIBUTED).map(|r| r.models[mi].conversions).sum();
                        let own = c.rows.iter().find(|r| r.key == ch.channel).map_or(0.0, |r| r.models[mi].conversions);
                        m.credit_rows = (attributed > 0.0).then(|| own / attributed);
                    }
                }
            }
            if b.resamples_without_conversions > 0 {
                notes.push(format!(
                    "{} of {} resamples had no converting path; their shares count as 0.",
                    b.resamples_without_conversions, b.resamples
                ));
            }
        } else {
            notes.push("No path rows were given (--paths): the data-driven models' shares have no intervals.".into());
        }
        let bootstrap_limits = bootstrap.as_ref().map(|_| BOOTSTRAP_LIMITS.to_string());
        Report {
            format_version: FORMAT_VERSION,
            comparison,
            bootstrap,
            bootstrap_limits,
            notes,
            cautions: CAUTIONS.iter().map(|s| s.to_string()).collect(),
        }
    }
}

/// Reads everything `inputs` names and builds the report.
pub fn build_report(inputs: &ReportInputs) -> Result<Report, ReportError> {
    if inputs.credits.is_empty() {
        return Err(ReportError::Invalid("no credit rows to compare: give --credits PATH".into()));
    }
    let experiments = match &inputs.experiments {
        Some(p) => read_experiments(p)?,
        None => Vec::new(),
    };
    let rows = read_credit(&inputs.credits)?;
    if rows.is_empty() {
        let names: Vec<String> = inputs.credits.iter().map(|p| p.display().to_string()).collect();
        return Err(ReportError::NoInput(format!("no credit rows in {}", names.join(", "))));
    }
    let orders = markov_orders(&rows);
    let mut cmp = Comparison::new(CompareOptions { by: inputs.by, baseline: inputs.baseline.clone(), experiments });
    for g in group_by_conversion(rows) {
        cmp.add_conversion(&g)?;
    }
    let comparison = cmp.finish()?;
    let mut notes = Vec::new();
    let boot = if inputs.paths.is_empty() {
        None
    } else {
        let paths = read_paths(&inputs.paths)?;
        let mut opts = inputs.bootstrap.clone();
        opts.markov_order = match (inputs.markov_order, orders.len()) {
            (Some(k), _) => k,
            (None, 0) => opts.markov_order,
            (None, _) => {
                if orders.len() > 1 {
                    notes.push(format!(
                        "The markov rows name several orders ({:?}); the bootstrap refits order {}.",
                        orders,
                        orders.last().expect("non-empty")
                    ));
                }
                *orders.last().expect("non-empty")
            }
        };
        Some(bootstrap(&paths, &opts)?)
    };
    let mut report = Report::new(comparison, boot);
    report.notes.extend(notes);
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn markov_order_from_versions() {
        let row = |model: &str, version: Option<&str>| CreditRecord {
            conversion_id: "c".into(),
            model: model.into(),
            model_version: version.map(String::from),
            goal: "g".into(),
            channel: "x".into(),
            campaign: None,
            position: 1,
            conversion_ms: 0,
            credit: 1.0,
            credited_value: None,
            currency: None,
        };
        let rows = [
            row("markov", Some("markov-o2-0123456789abcdef")),
            row("shapley", Some("shapley-0123456789abcdef")),
            row("linear", None),
        ];
        assert_eq!(markov_orders(&rows).into_iter().collect::<Vec<_>>(), vec![2]);
    }
}
