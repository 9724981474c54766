//! The comparison: an accumulator fed one conversion's credit rows (every
//! model) at a time.
//!
//! Per key (channel, or channel and campaign) and model it adds up the
//! credited conversions (the sum of credit) and the credited value; per
//! pair of models it adds up the shift matrix of each conversion (crate
//! docs, "The shift matrix"); per experiment it adds up each model's
//! credit to the tested channel in the tested period. [`Comparison::result`]
//! turns the sums into a [`ComparisonResult`]: totals, shares, differences
//! from the baseline model, shift matrices and lift checks. It does not
//! consume the accumulator, so a service can answer from it at any time.
//!
//! Sums are exact (crate docs), so the result does not depend on the order
//! in which conversions are fed, and within a conversion rows are taken in
//! (model, position) order, so the order of rows does not matter either.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use apportion_engine::contract::time::format_ms;
use serde::{Deserialize, Serialize};

use crate::exact::Exact;
use crate::lift::{side, Experiment, LiftCheck, LiftModel, Side, Z90};
use crate::rows::CreditRecord;
use crate::ReportError;

/// The models of the contract in their usual order (rule models first);
/// other model names follow in name order.
pub const MODEL_ORDER: [&str; 7] =
    ["last_touch", "first_touch", "linear", "time_decay", "u_shaped", "shapley", "markov"];

/// Channel name of a conversion with no eligible touch.
pub const UNATTRIBUTED: &str = "unattributed";

/// What the rows are grouped by.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GroupBy {
    /// Per channel.
    #[default]
    Channel,
    /// Per channel and campaign (`channel / campaign`; a touch without a
    /// campaign counts as `channel / (no campaign)`).
    Campaign,
}

impl std::str::FromStr for GroupBy {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "channel" => Ok(GroupBy::Channel),
            "campaign" => Ok(GroupBy::Campaign),
            other => Err(format!("--by must be channel or campaign, not {other:?}")),
        }
    }
}

impl GroupBy {
    /// `channel` or `campaign`.
    pub fn as_str(self) -> &'static str {
        match self {
            GroupBy::Channel => "channel",
            GroupBy::Campaign => "campaign",
        }
    }

    /// The key of a row.
    pub fn key(self, channel: &str, campaign: Option<&str>) -> String {
        match self {
            GroupBy::Channel => channel.to_string(),
            GroupBy::Campaign if channel == UNATTRIBUTED => channel.to_string(),
            GroupBy::Campaign => format!("{channel} / {}", campaign.unwrap_or("(no campaign)")),
        }
    }
}

/// What to compare.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CompareOptions {
    /// Group by channel or campaign.
    pub by: GroupBy,
    /// The model the others are compared with; default `last_touch` when
    /// present, else the first model in [`MODEL_ORDER`] order.
    pub baseline: Option<String>,
    /// Lift tests to check the models against.
    pub experiments: Vec<Experiment>,
}

#[derive(Debug, Clone, Default)]
struct LiftAcc {
    conversions: u64,
    seen: bool,
    /// Per model id.
    credited: Vec<Exact>,
}

/// The accumulator (module docs).
#[derive(Debug, Clone, Default)]
pub struct Comparison {
    opts: CompareOptions,
    models: Vec<String>,
    model_ids: HashMap<String, usize>,
    keys: Vec<String>,
    key_ids: HashMap<String, usize>,
    conversions: u64,
    /// Conversions with rows of each model.
    model_conversions: Vec<u64>,
    /// Distinct `model_version`s of each model.
    versions: Vec<BTreeSet<String>>,
    /// `[model][key]` -> (credit, value).
    totals: Vec<Vec<(Exact, Exact)>>,
    /// (model a, model b) with a < b by id -> (key under a, key under b) -> credit.
    shifts: HashMap<(usize, usize), HashMap<(usize, usize), Exact>>,
    goals: BTreeMap<String, u64>,
    currencies: BTreeSet<String>,
    first_ms: Option<i64>,
    last_ms: Option<i64>,
    lift: Vec<LiftAcc>,
}

/// One conversion's credit under one model, per key (key id, credit, value).
type PerKey = Vec<(usize, f64, f64)>;

impl Comparison {
    /// An empty comparison.
    pub fn new(opts: CompareOptions) -> Self {
        let lift = vec![LiftAcc::default(); opts.experiments.len()];
        Comparison { opts, lift, ..Default::default() }
    }

    /// The options it was made with.
    pub fn options(&self) -> &CompareOptions {
        &self.opts
    }

    /// Conversions fed so far.
    pub fn conversions(&self) -> u64 {
        self.conversions
    }

    fn model_id(&mut self, name: &str) -> usize {
        if let Some(&id) = self.model_ids.get(name) {
            return id;
        }
        let id = self.models.len();
        self.models.push(name.to_string());
        self.model_ids.insert(name.to_string(), id);
        self.model_conversions.push(0);
        self.versions.push(BTreeSet::new());
        self.totals.push(vec![(Exact::default(), Exact::default()); self.keys.len()]);
        for l in &mut self.lift {
            l.credited.push(Exact::default());
        }
        id
    }

    fn key_id(&mut self, key: String) -> usize {
        if let Some(&id) = self.key_ids.get(&key) {
            return id;
        }
        let id = self.keys.len();
        self.key_ids.insert(key.clone(), id);
        self.keys.push(key);
        for t in &mut self.totals {
            t.push((Exact::default(), Exact::default()));
        }
        id
    }

    /// Adds one conversion: its credit rows under every model (any order;
    /// a repeated (model, position) row is counted once). Rows of several
    /// conversions are an error; no rows is a no-op.
    pub fn add_conversion(&mut self, rows: &[CreditRecord]) -> Result<(), ReportError> {
        let Some(first) = rows.first() else { return Ok(()) };
        if let Some(other) = rows.iter().find(|r| r.conversion_id != first.conversion_id) {
            return Err(ReportError::Invalid(format!(
                "add_conversion got rows of two conversions ({:?} and {:?})",
                first.conversion_id, other.conversion_id
            )));
        }
        let mut sorted: Vec<&CreditRecord> = rows.iter().collect();
        sorted.sort_by(|a, b| (&a.model, a.position).cmp(&(&b.model, b.position)));
        sorted.dedup_by(|a, b| a.model == b.model && a.position == b.position);

        let ts = first.conversion_ms;
        self.conversions += 1;
        *self.goals.entry(first.goal.clone()).or_default() += 1;
        if let Some(c) = &first.currency {
            self.currencies.insert(c.clone());
        }
        self.first_ms = Some(self.first_ms.map_or(ts, |m| m.min(ts)));
        self.last_ms = Some(self.last_ms.map_or(ts, |m| m.max(ts)));
        let in_period: Vec<usize> = (0..self.opts.experiments.len())
            .filter(|&e| {
                let x = &self.opts.experiments[e];
                x.start_ms <= ts && ts < x.end_ms
            })
            .collect();
        for &e in &in_period {
            self.lift[e].conversions += 1;
        }

        // Per model: credit and value per key, summed in position order.
        let mut per_model: Vec<(usize, PerKey)> = Vec::new();
        for r in sorted {
            let m = self.model_id(&r.model);
            let k = self.key_id(self.opts.by.key(&r.channel, r.campaign.as_deref()));
            if let Some(v) = &r.model_version {
                if !self.versions[m].contains(v) {
                    self.versions[m].insert(v.clone());
                }
            }
            let value = r.credited_value.unwrap_or(0.0);
            self.totals[m][k].0.add(r.credit);
            self.totals[m][k].1.add(value);
            for &e in &in_period {
                if r.channel == self.opts.experiments[e].channel {
                    self.lift[e].credited[m].add(r.credit);
                    self.lift[e].seen = true;
                }
            }
            if !matches!(per_model.last(), Some((pm, _)) if *pm == m) {
                per_model.push((m, Vec::new()));
            }
            let keys = &mut per_model.last_mut().expect("pushed above").1;
            match keys.iter_mut().find(|(kk, _, _)| *kk == k) {
                Some(e) => {
                    e.1 += r.credit;
                    e.2 += value;
                }
                None => keys.push((k, r.credit, value)),
            }
        }
        for (m, _) in &per_model {
            self.model_conversions[*m] += 1;
        }
        for i in 0..per_model.len() {
            for j in i + 1..per_model.len() {
                let (ma, a) = &per_model[i];
                let (mb, b) = &per_model[j];
                let (ma, mb, a, b) = if ma < mb { (*ma, *mb, a, b) } else { (*mb, *ma, b, a) };
                add_shift(self.shifts.entry((ma, mb)).or_default(), a, b, &self.keys);
            }
        }
        Ok(())
    }

    /// The models in report order: [`MODEL_ORDER`] first, then by name.
    fn ordered_models(&self) -> Vec<usize> {
        let mut ids: Vec<usize> = (0..self.models.len()).collect();
        let rank = |name: &str| MODEL_ORDER.iter().position(|m| *m == name).unwrap_or(MODEL_ORDER.len());
        ids.sort_by(|&a, &b| (rank(&self.models[a]), &self.models[a]).cmp(&(rank(&self.models[b]), &self.models[b])));
        ids
    }

    /// Everything added so far, as numbers (module docs).
    pub fn result(&self) -> Result<ComparisonResult, ReportError> {
        let order = self.ordered_models();
        let baseline = match &self.opts.baseline {
            Some(b) => match self.model_ids.get(b) {
                Some(&id) => Some(id),
                None if self.models.is_empty() => None,
                None => {
                    let names: Vec<&str> = order.iter().map(|&m| self.models[m].as_str()).collect();
                    return Err(ReportError::Invalid(format!(
                        "baseline model {b:?} has no credit rows; the rows have {}",
                        names.join(", ")
                    )));
                }
            },
            None => self.model_ids.get("last_touch").copied().or(order.first().copied()),
        };
        let credit = |m: usize, k: usize| self.totals[m][k].0.value();
        let value = |m: usize, k: usize| self.totals[m][k].1.value();
        // Keys by credit under the baseline (descending), then name; unattributed last.
        let mut key_order: Vec<usize> = (0..self.keys.len()).collect();
        key_order.sort_by(|&a, &b| {
            let ua = self.keys[a] == UNATTRIBUTED;
            let ub = self.keys[b] == UNATTRIBUTED;
            let (ca, cb) = baseline.map_or((0.0, 0.0), |m| (credit(m, a), credit(m, b)));
            ua.cmp(&ub).then(cb.total_cmp(&ca)).then(self.keys[a].cmp(&self.keys[b]))
        });
        let model_totals: Vec<ModelTotal> = order
            .iter()
            .map(|&m| {
                let mut c = Exact::default();
                let mut v = Exact::default();
                for t in &self.totals[m] {
                    c.add_exact(t.0);
                    v.add_exact(t.1);
                }
                ModelTotal {
                    model: self.models[m].clone(),
                    conversions: self.model_conversions[m],
                    credited_conversions: c.value(),
                    credited_value: v.value(),
                    snapshots: self.versions[m].len() as u64,
                }
            })
            .collect();
        let totals_of: HashMap<usize, f64> =
            order.iter().zip(&model_totals).map(|(&m, t)| (m, t.credited_conversions)).collect();
        let rows: Vec<KeyRow> = key_order
            .iter()
            .map(|&k| KeyRow {
                key: self.keys[k].clone(),
                models: order
                    .iter()
                    .map(|&m| {
                        let (c, v) = (credit(m, k), value(m, k));
                        let (bc, bv) = baseline.map_or((c, v), |b| (credit(b, k), value(b, k)));
                        let rel = |x: f64, base: f64| (base != 0.0).then(|| (x - base) / base);
                        let total = totals_of[&m];
                        KeyModel {
                            model: self.models[m].clone(),
                            conversions: c,
                            value: v,
                            share: if total > 0.0 { c / total } else { 0.0 },
                            conversions_difference: c - bc,
                            conversions_relative: rel(c, bc),
                            value_difference: v - bv,
                            value_relative: rel(v, bv),
                        }
                    })
                    .collect(),
            })
            .collect();

        // Pairs: the baseline against every other model first (from the
        // baseline), then every other pair in model order.
        let mut pairs: Vec<(usize, usize)> = Vec::new();
        if let Some(b) = baseline {
            pairs.extend(order.iter().filter(|&&m| m != b).map(|&m| (b, m)));
        }
        for (i, &a) in order.iter().enumerate() {
            for &b in &order[i + 1..] {
                if Some(a) != baseline && Some(b) != baseline {
                    pairs.push((a, b));
                }
            }
        }
        let pos: HashMap<usize, usize> = key_order.iter().enumerate().map(|(i, &k)| (k, i)).collect();
        let shifts = pairs
            .into_iter()
            .map(|(from, to)| {
                let n = key_order.len();
                let mut matrix = vec![vec![0.0; n]; n];
                let mut moved = Exact::default();
                let (lo, hi) = (from.min(to), from.max(to));
                if let Some(cells) = self.shifts.get(&(lo, hi)) {
                    for (&(ka, kb), x) in cells {
                        // Stored from the lower id to the higher one.
                        let (kf, kt) = if from == lo { (ka, kb) } else { (kb, ka) };
                        matrix[pos[&kf]][pos[&kt]] = x.value();
                        if kf != kt {
                            moved.add_exact(*x);
                        }
                    }
                }
                Shift {
                    from_model: self.models[from].clone(),
                    to_model: self.models[to].clone(),
                    moved: moved.value(),
                    matrix,
                }
            })
            .collect();

        let lift_tests = self
            .opts
            .experiments
            .iter()
            .zip(&self.lift)
            .map(|(e, acc)| LiftCheck {
                channel: e.channel.clone(),
                start: format_ms(e.start_ms),
                end: format_ms(e.end_ms),
                measured: e.incremental_conversions,
                std_error: e.std_error,
                low: e.low,
                high: e.high,
                interval: match e.std_error {
                    Some(_) => format!("measured ± {Z90:.4} × std_error (90 %, normal)"),
                    None => "as given in the experiments file".into(),
                },
                source: e.source.clone(),
                line: e.line,
                conversions_in_period: acc.conversions,
                channel_seen: acc.seen,
                models: order
                    .iter()
                    .map(|&m| {
                        let credited = acc.credited.get(m).map_or(0.0, |x| x.value());
                        let s = side(credited, e.low, e.high);
                        LiftModel { model: self.models[m].clone(), credited, outside: s != Side::Inside, side: s }
                    })
                    .collect(),
            })
            .collect();

        let currencies: Vec<String> = self.currencies.iter().cloned().collect();
        Ok(ComparisonResult {
            by: self.opts.by,
            baseline: baseline.map(|b| self.models[b].clone()),
            models: order.iter().map(|&m| self.models[m].clone()).collect(),
            keys: key_order.iter().map(|&k| self.keys[k].clone()).collect(),
            conversions: self.conversions,
            first_conversion: self.first_ms.map(format_ms),
            last_conversion: self.last_ms.map(format_ms),
            goals: self.goals.clone(),
            currency: (currencies.len() == 1).then(|| currencies[0].clone()),
            currencies,
            model_totals,
            rows,
            shifts,
            lift_tests,
        })
    }

    /// [`Comparison::result`], consuming the accumulator.
    pub fn finish(self) -> Result<ComparisonResult, ReportError> {
        self.result()
    }
}

/// Adds one conversion's shift from credit `a` to credit `b` (crate docs).
/// Keys are taken in name order, so the floating-point steps within a
/// conversion do not depend on the order in which keys were first seen.
fn add_shift(cells: &mut HashMap<(usize, usize), Exact>, a: &PerKey, b: &PerKey, names: &[String]) {
    let mut keys: BTreeMap<&str, (usize, f64, f64)> = BTreeMap::new();
    for &(k, c, _) in a {
        keys.entry(names[k].as_str()).or_insert((k, 0.0, 0.0)).1 = c;
    }
    for &(k, c, _) in b {
        keys.entry(names[k].as_str()).or_insert((k, 0.0, 0.0)).2 = c;
    }
    let mut gain = 0.0;
    for &(_, x, y) in keys.values() {
        if y > x {
            gain += y - x;
        }
    }
    for &(i, ai, bi) in keys.values() {
        let keep = ai.min(bi);
        if keep > 0.0 {
            cells.entry((i, i)).or_default().add(keep);
        }
        let loss = ai - bi;
        if loss > 0.0 && gain > 0.0 {
            for &(j, aj, bj) in keys.values() {
                let g = bj - aj;
                if g > 0.0 {
                    cells.entry((i, j)).or_default().add(loss * g / gain);
                }
            }
        }
    }
}

/// Totals of one model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelTotal {
    /// Model name.
    pub model: String,
    /// Conversions with rows of this model.
    pub conversions: u64,
    /// Sum of its credit over every key (equals `conversions` up to rounding).
    pub credited_conversions: f64,
    /// Sum of its credited value.
    pub credited_value: f64,
    /// Distinct `model_version`s in its rows (data-driven models refitted
    /// while crediting have several).
    pub snapshots: u64,
}

/// One model's numbers for one key.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KeyModel {
    /// Model name.
    pub model: String,
    /// Credited conversions (sum of credit).
    pub conversions: f64,
    /// Credited value (sum of `credited_value`).
    pub value: f64,
    /// `conversions` over the model's credited conversions of every key.
    pub share: f64,
    /// `conversions` minus the baseline's.
    pub conversions_difference: f64,
    /// The difference over the baseline's conversions; null when the baseline's are 0.
    pub conversions_relative: Option<f64>,
    /// `value` minus the baseline's.
    pub value_difference: f64,
    /// The difference over the baseline's value; null when the baseline's is 0.
    pub value_relative: Option<f64>,
}

/// Every model's numbers for one key.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KeyRow {
    /// Channel, or `channel / campaign`.
    pub key: String,
    /// One entry per model, in `models` order.
    pub models: Vec<KeyModel>,
}

/// How credit moves from one model to another.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Shift {
    /// The model credit moves from (rows of the matrix).
    pub from_model: String,
    /// The model credit moves to (columns).
    pub to_model: String,
    /// Credit moved between different keys (sum of the off-diagonal cells).
    pub moved: f64,
    /// `matrix[i][j]`: credit key i has under `from_model` that key j has
    /// under `to_model` (keys in the result's `keys` order; the diagonal
    /// is credit a key keeps). Row sums are the keys' totals under
    /// `from_model`, column sums those under `to_model`.
    pub matrix: Vec<Vec<f64>>,
}

/// What [`Comparison::result`] returns; the JSON of `GET /v1/compare`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ComparisonResult {
    /// `channel` or `campaign`.
    pub by: GroupBy,
    /// The model the differences are taken from; null without rows.
    pub baseline: Option<String>,
    /// Models, in report order.
    pub models: Vec<String>,
    /// Keys by credit under the baseline, descending (`unattributed` last).
    pub keys: Vec<String>,
    /// Conversions fed.
    pub conversions: u64,
    /// Earliest conversion time (RFC 3339).
    pub first_conversion: Option<String>,
    /// Latest conversion time (RFC 3339).
    pub last_conversion: Option<String>,
    /// Conversions per goal.
    pub goals: BTreeMap<String, u64>,
    /// The currency of every value, when there is exactly one.
    pub currency: Option<String>,
    /// Every currency seen (values in several currencies are summed as
    /// plain numbers; the report warns).
    pub currencies: Vec<String>,
    /// Per model, in `models` order.
    pub model_totals: Vec<ModelTotal>,
    /// Per key, in `keys` order.
    pub rows: Vec<KeyRow>,
    /// Every pair of models once: the baseline to each other model first.
    pub shifts: Vec<Shift>,
    /// One check per experiment, in file order.
    pub lift_tests: Vec<LiftCheck>,
}

#[cfg(test)]
mod tests {
    use super::*;

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
            credited_value: Some(credit * 10.0),
            currency: Some("EUR".into()),
        }
    }

    #[test]
    fn rows_of_two_conversions_are_refused() {
        let mut c = Comparison::new(CompareOptions::default());
        let e = c.add_conversion(&[row("a", "linear", "x", 1, 1.0), row("b", "linear", "x", 1, 1.0)]);
        assert!(e.unwrap_err().to_string().contains("two conversions"));
        assert_eq!(c.conversions(), 0);
        c.add_conversion(&[]).unwrap();
        let r = c.result().unwrap();
        assert_eq!((r.conversions, r.baseline.clone(), r.models.len()), (0, None, 0));
    }

    #[test]
    fn baseline_must_have_rows() {
        let mut c = Comparison::new(CompareOptions { baseline: Some("markov".into()), ..Default::default() });
        c.add_conversion(&[row("a", "linear", "x", 1, 1.0)]).unwrap();
        let e = c.result().unwrap_err().to_string();
        assert!(e.contains("baseline model \"markov\" has no credit rows; the rows have linear"), "{e}");
    }

    #[test]
    fn campaign_keys() {
        assert_eq!(GroupBy::Campaign.key("email", Some("spring")), "email / spring");
        assert_eq!(GroupBy::Campaign.key("email", None), "email / (no campaign)");
        assert_eq!(GroupBy::Campaign.key(UNATTRIBUTED, None), UNATTRIBUTED);
        assert_eq!(GroupBy::Channel.key("email", Some("spring")), "email");
        assert!("both".parse::<GroupBy>().is_err());
    }
}
