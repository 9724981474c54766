//! The report as one self-contained HTML page: inline CSS, inline SVG, no
//! script, nothing fetched, so it opens offline and can be mailed as a file.
//!
//! Every chart (`<svg id="chart-…">`) is followed by a data table
//! (`<table id="table-…">`) with a caption and header cells, for screen
//! readers and for anyone who wants the numbers. Each numeric cell carries
//! `data-path`, the JSON pointer (RFC 6901) of the value it shows in the JSON
//! report, and `data-value`, that value in full precision; the cell's text
//! is the value rounded for reading. A test opens the page in a real browser
//! and checks every such cell against the JSON output.

use std::fmt::Write;

use super::svg::{self, color, esc, Bars, Heat, Intervals, LiftRow};
use super::{num, pct, period, signed, signed_pct};
use crate::report::Report;

const STYLE: &str = r#"
:root { color-scheme: light; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans", sans-serif; color: #1b1b1b; background: #fff; margin: 0; line-height: 1.45; }
main { max-width: 1180px; margin: 0 auto; padding: 24px 28px 48px; }
h1 { font-size: 1.7rem; margin: 0 0 .3rem; }
h2 { font-size: 1.3rem; margin: 2.2rem 0 .5rem; border-bottom: 2px solid #0072B2; padding-bottom: .2rem; }
h3 { font-size: 1.05rem; margin: 1.4rem 0 .4rem; }
p.lead { font-size: 1.02rem; margin: .2rem 0 1rem; }
nav ul { list-style: none; padding: 0; display: flex; flex-wrap: wrap; gap: .3rem 1.1rem; margin: .4rem 0 0; }
nav a { color: #005a8c; }
.cautions { border-left: 6px solid #D55E00; background: #fff6ef; padding: .6rem 1rem; margin: 1rem 0; }
.cautions h2 { border: 0; margin-top: .4rem; font-size: 1.15rem; }
.notes { border-left: 6px solid #56B4E9; background: #f1f8fd; padding: .5rem 1rem; margin: 1rem 0; }
.notes h2 { border: 0; margin-top: .4rem; font-size: 1.15rem; }
figure { margin: .6rem 0 .4rem; }
figcaption { font-size: .9rem; color: #444; margin-top: .2rem; }
svg.chart { max-width: 100%; height: auto; display: block; }
.table-wrap { overflow-x: auto; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .84rem; }
caption { text-align: left; font-weight: 600; padding: .3rem 0; }
th, td { padding: .2rem .45rem; border-bottom: 1px solid #ddd; }
thead th { background: #f0f0f0; text-align: right; vertical-align: bottom; }
thead th:first-child, tbody th, tfoot th { text-align: left; }
thead th[colspan] { text-align: center; border-bottom: 1px solid #ccc; }
td { text-align: right; font-variant-numeric: tabular-nums; }
tbody tr:nth-child(even) { background: #fafafa; }
tfoot td, tfoot th { border-top: 2px solid #999; font-weight: 600; }
td.diag { font-style: italic; color: #555; }
td.outside { font-weight: 700; }
.method dt { font-weight: 600; margin-top: .6rem; }
.method dd { margin-left: 1.2rem; }
footer { margin-top: 2.5rem; font-size: .85rem; color: #555; }
"#;

/// A numeric cell: the JSON pointer, the exact value, the text shown.
fn cell(path: &str, value: Option<f64>, text: &str, class: &str) -> String {
    let v = value.map_or("null".to_string(), |v| v.to_string());
    let class = if class.is_empty() { String::new() } else { format!(r#" class="{class}""#) };
    format!(r#"<td data-path="{}" data-value="{v}"{class}>{}</td>"#, esc(path), esc(text))
}

/// An id fragment from a name: `[a-z0-9_-]`, anything else as `-`.
pub(crate) fn slug(s: &str) -> String {
    s.chars()
        .map(|c| if c.is_ascii_alphanumeric() || c == '_' || c == '-' { c.to_ascii_lowercase() } else { '-' })
        .collect()
}

fn figure(o: &mut String, chart: &str, caption: &str) {
    let _ = write!(o, "<figure>{chart}<figcaption>{}</figcaption></figure>", esc(caption));
}

/// The page.
pub(crate) fn page(r: &Report) -> String {
    let c = &r.comparison;
    let by = c.by.as_str();
    let series: Vec<(String, &'static str)> = c.models.iter().enumerate().map(|(i, m)| (m.clone(), color(i))).collect();
    let base = c.baseline.clone().unwrap_or_default();
    let bi = c.models.iter().position(|m| *m == base);
    let currency = c.currency.clone().unwrap_or_else(|| {
        if c.currencies.is_empty() {
            "no currency".into()
        } else {
            "mixed currencies".into()
        }
    });
    let conversions_span = match (&c.first_conversion, &c.last_conversion) {
        (Some(a), Some(b)) => format!("{} to {}", &a[..10], &b[..10]),
        _ => "no conversions".into(),
    };
    let mut o = String::new();
    let _ = write!(
        o,
        r#"<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1"><title>Model comparison: how credit moves between attribution models</title><style>{STYLE}</style></head><body><main>"#
    );
    let _ = write!(
        o,
        r#"<header><h1>How credit moves between attribution models</h1><p class="lead" id="summary">{} conversions from {conversions_span}, grouped by {by}; {} models compared with the baseline <strong>{}</strong>. Values in {}.</p>"#,
        c.conversions,
        c.models.len(),
        esc(&base),
        esc(&currency)
    );
    o.push_str(r##"<nav aria-label="Sections"><ul><li><a href="#cautions">Read this first</a></li><li><a href="#credit">Credit per model</a></li><li><a href="#value">Value</a></li><li><a href="#difference">Difference from the baseline</a></li><li><a href="#shift">Where credit moves</a></li><li><a href="#bootstrap">Uncertainty</a></li><li><a href="#lift">Lift tests</a></li><li><a href="#method">Method</a></li></ul></nav></header>"##);

    o.push_str(r#"<section id="cautions" class="cautions"><h2>Read this first</h2><ul>"#);
    for t in &r.cautions {
        let _ = write!(o, "<li>{}</li>", esc(t));
    }
    o.push_str("</ul></section>");
    if !r.notes.is_empty() {
        o.push_str(r#"<section id="notes" class="notes"><h2>About this input</h2><ul>"#);
        for t in &r.notes {
            let _ = write!(o, "<li>{}</li>", esc(t));
        }
        o.push_str("</ul></section>");
    }

    // Credit and value per key and model.
    for (section, metric, total_metric, title, unit, decimals) in [
        (
            "credit",
            "conversions",
            "credited_conversions",
            format!("Conversions credited per {by}"),
            "conversions".to_string(),
            2,
        ),
        ("value", "value", "credited_value", format!("Value credited per {by}"), currency.clone(), 2),
    ] {
        let values: Vec<Vec<f64>> = c
            .rows
            .iter()
            .map(|row| row.models.iter().map(|m| if metric == "value" { m.value } else { m.conversions }).collect())
            .collect();
        let _ = write!(o, r#"<section id="{section}"><h2>{}</h2>"#, esc(&title));
        let desc = format!(
            "Grouped bars: for each {by}, one bar per model ({}), height = {} credited. The table below has the numbers.",
            c.models.join(", "),
            unit
        );
        let chart = svg::bars(&Bars {
            id: &format!("chart-{section}"),
            title: &title,
            desc: &desc,
            categories: &c.keys,
            series: &series,
            values: &values,
            axis_label: &unit,
            decimals,
        });
        figure(
            &mut o,
            &chart,
            &format!("{title}, one colour per model. Each conversion's credit sums to 1 under every model."),
        );
        let _ = write!(
            o,
            r#"<div class="table-wrap"><table id="table-{section}"><caption>{} ({}), per {by} and model</caption><thead><tr><th scope="col">{by}</th>"#,
            esc(&title),
            esc(&unit)
        );
        for m in &c.models {
            let _ = write!(o, r#"<th scope="col">{}</th>"#, esc(m));
        }
        o.push_str("</tr></thead><tbody>");
        for (i, row) in c.rows.iter().enumerate() {
            let _ = write!(o, r#"<tr><th scope="row">{}</th>"#, esc(&row.key));
            for (j, m) in row.models.iter().enumerate() {
                let v = if metric == "value" { m.value } else { m.conversions };
                o.push_str(&cell(&format!("/rows/{i}/models/{j}/{metric}"), Some(v), &num(v, decimals), ""));
            }
            o.push_str("</tr>");
        }
        o.push_str(r#"</tbody><tfoot><tr><th scope="row">total</th>"#);
        for (j, t) in c.model_totals.iter().enumerate() {
            let v = if metric == "value" { t.credited_value } else { t.credited_conversions };
            o.push_str(&cell(&format!("/model_totals/{j}/{total_metric}"), Some(v), &num(v, decimals), ""));
        }
        o.push_str("</tr></tfoot></table></div></section>");
    }

    // Differences from the baseline.
    o.push_str(r#"<section id="difference"><h2>Difference from the baseline</h2>"#);
    let others: Vec<usize> = (0..c.models.len()).filter(|&j| Some(j) != bi).collect();
    if bi.is_none() || others.is_empty() {
        o.push_str("<p>Only one model in the rows: nothing to compare.</p>");
    } else {
        let oseries: Vec<(String, &'static str)> = others.iter().map(|&j| series[j].clone()).collect();
        let values: Vec<Vec<f64>> =
            c.rows.iter().map(|row| others.iter().map(|&j| row.models[j].conversions_difference).collect()).collect();
        let title = format!("Conversions gained (+) or lost (−) per {by}, compared with {base}");
        let desc = format!(
            "Grouped bars around zero: for each {by}, one bar per model other than {base}; above zero the model gives \
             the {by} more conversions than {base}, below zero fewer."
        );
        let chart = svg::bars(&Bars {
            id: "chart-difference",
            title: &title,
            desc: &desc,
            categories: &c.keys,
            series: &oseries,
            values: &values,
            axis_label: "conversions vs baseline",
            decimals: 2,
        });
        figure(&mut o, &chart, &title);
        for (table, metric, rel, what, unit) in [
            ("table-difference", "conversions_difference", "conversions_relative", "Conversions", "conversions"),
            ("table-value-difference", "value_difference", "value_relative", "Value", currency.as_str()),
        ] {
            let _ = write!(
                o,
                r#"<div class="table-wrap"><table id="{table}"><caption>{what} credited minus {}'s ({}), and relative to {}'s</caption><thead><tr><th scope="col" rowspan="2">{by}</th>"#,
                esc(&base),
                esc(unit),
                esc(&base)
            );
            for &j in &others {
                let _ = write!(o, r#"<th scope="colgroup" colspan="2">{}</th>"#, esc(&c.models[j]));
            }
            o.push_str("</tr><tr>");
            for _ in &others {
                o.push_str(r#"<th scope="col">difference</th><th scope="col">relative</th>"#);
            }
            o.push_str("</tr></thead><tbody>");
            for (i, row) in c.rows.iter().enumerate() {
                let _ = write!(o, r#"<tr><th scope="row">{}</th>"#, esc(&row.key));
                for &j in &others {
                    let m = &row.models[j];
                    let (d, r) = if metric == "value_difference" {
                        (m.value_difference, m.value_relative)
                    } else {
                        (m.conversions_difference, m.conversions_relative)
                    };
                    o.push_str(&cell(&format!("/rows/{i}/models/{j}/{metric}"), Some(d), &signed(d, 2), ""));
                    o.push_str(&cell(
                        &format!("/rows/{i}/models/{j}/{rel}"),
                        r,
                        &r.map_or("n/a".into(), signed_pct),
                        "",
                    ));
                }
                o.push_str("</tr>");
            }
            o.push_str("</tbody></table></div>");
        }
        let _ = write!(o, "<p>Relative differences are n/a where {} gives the {by} nothing.</p>", esc(&base));
    }
    o.push_str("</section>");

    // Shift matrices from the baseline.
    let _ = write!(
        o,
        r#"<section id="shift"><h2>Where credit moves when {} is replaced</h2><p>For each conversion, the credit a {by} loses goes to the {by}s that gain on that same conversion, in proportion to their gains; the cells add this up over all conversions. Rows: the {by} that has the credit under {}; columns: the {by} that has it under the other model; the diagonal is credit a {by} keeps. Row totals are {}'s totals, column totals the other model's. The JSON output has the matrix of every pair of models.</p>"#,
        esc(&base),
        esc(&base),
        esc(&base)
    );
    let mut any = false;
    for (s, sh) in c.shifts.iter().enumerate() {
        if sh.from_model != base {
            continue;
        }
        any = true;
        let Some(tj) = c.models.iter().position(|m| *m == sh.to_model) else { continue };
        let fj = bi.expect("a shift from the baseline");
        let id = slug(&sh.to_model);
        let title = format!("Credit moving from {} to {}", sh.from_model, sh.to_model);
        let desc = format!(
            "Heat map, {n} by {n} {by}s: the cell in row A and column B is the credit A has under {} that B has under \
             {}; darker means more credit moved; the grey diagonal is credit kept. {} conversions move in all.",
            sh.from_model,
            sh.to_model,
            num(sh.moved, 2),
            n = c.keys.len()
        );
        let _ = write!(o, r#"<h3 id="shift-{id}">{}</h3>"#, esc(&title));
        let chart = svg::heat(&Heat {
            id: &format!("chart-shift-{id}"),
            title: &title,
            desc: &desc,
            keys: &c.keys,
            matrix: &sh.matrix,
            from: &sh.from_model,
            to: &sh.to_model,
        });
        figure(&mut o, &chart, &format!("{title}: {} conversions change {by}.", num(sh.moved, 2)));
        let _ = write!(
            o,
            r#"<div class="table-wrap"><table id="table-shift-{id}"><caption>{} (rows: under {}; columns: under {})</caption><thead><tr><th scope="col">{by}</th>"#,
            esc(&title),
            esc(&sh.from_model),
            esc(&sh.to_model)
        );
        for k in &c.keys {
            let _ = write!(o, r#"<th scope="col">{}</th>"#, esc(k));
        }
        let _ = write!(o, r#"<th scope="col">total under {}</th></tr></thead><tbody>"#, esc(&sh.from_model));
        for (i, row) in sh.matrix.iter().enumerate() {
            let _ = write!(o, r#"<tr><th scope="row">{}</th>"#, esc(&c.keys[i]));
            for (j, v) in row.iter().enumerate() {
                let class = if i == j { "diag" } else { "" };
                o.push_str(&cell(&format!("/shifts/{s}/matrix/{i}/{j}"), Some(*v), &num(*v, 2), class));
            }
            let t = c.rows[i].models[fj].conversions;
            o.push_str(&cell(&format!("/rows/{i}/models/{fj}/conversions"), Some(t), &num(t, 2), ""));
            o.push_str("</tr>");
        }
        let _ = write!(o, r#"</tbody><tfoot><tr><th scope="row">total under {}</th>"#, esc(&sh.to_model));
        for i in 0..c.keys.len() {
            let t = c.rows[i].models[tj].conversions;
            o.push_str(&cell(&format!("/rows/{i}/models/{tj}/conversions"), Some(t), &num(t, 2), ""));
        }
        o.push_str("<td></td></tr></tfoot></table></div>");
    }
    if !any {
        o.push_str("<p>Only one model in the rows: no credit moves.</p>");
    }
    o.push_str("</section>");

    // Bootstrap.
    o.push_str(r#"<section id="bootstrap"><h2>How stable are the data-driven models?</h2>"#);
    match &r.bootstrap {
        None => o.push_str(
            "<p>No path rows were given (<code>--paths</code>), so the data-driven models' shares have no intervals.</p>",
        ),
        Some(b) => {
            let _ = write!(
                o,
                "<p>Each channel's share of the data-driven models' credit, refitted on all {} closed paths (dot), with \
                 its {:.0} % bootstrap interval (line): {}. Seed {}.</p>",
                b.paths,
                b.level * 100.0,
                esc(&b.method),
                b.seed
            );
            let mut order: Vec<usize> = (0..b.channels.len()).collect();
            order.sort_by(|&x, &y| {
                let p = |k: usize| b.channels[k].models.first().map_or(0.0, |m| m.point);
                p(y).total_cmp(&p(x)).then(b.channels[x].channel.cmp(&b.channels[y].channel))
            });
            let names: Vec<String> = order.iter().map(|&k| b.channels[k].channel.clone()).collect();
            let bseries: Vec<(String, &'static str)> = b
                .channels
                .first()
                .map_or(Vec::new(), |ch| {
                    ch.models
                        .iter()
                        .map(|m| {
                            let col = c.models.iter().position(|x| *x == m.model).map_or("#555555", color);
                            (m.model.clone(), col)
                        })
                        .collect()
                });
            let values: Vec<Vec<(f64, f64, f64)>> = order
                .iter()
                .map(|&k| b.channels[k].models.iter().map(|m| (m.point, m.low, m.high)).collect())
                .collect();
            let title = format!("Channel shares with {:.0} % bootstrap intervals", b.level * 100.0);
            let desc = "For each channel, one line per data-driven model from the low to the high end of the \
                        interval, with a dot at the share fitted on all paths.";
            let chart = svg::intervals(&Intervals {
                id: "chart-bootstrap",
                title: &title,
                desc,
                rows: &names,
                series: &bseries,
                values: &values,
            });
            figure(&mut o, &chart, &title);
            let _ = write!(
                o,
                r#"<div class="table-wrap"><table id="table-bootstrap"><caption>{} (share of the model's credit over the converting paths)</caption><thead><tr><th scope="col" rowspan="2">channel</th>"#,
                esc(&title)
            );
            let models: Vec<&str> = b.channels.first().map_or(Vec::new(), |ch| ch.models.iter().map(|m| m.model.as_str()).collect());
            for m in &models {
                let _ = write!(o, r#"<th scope="colgroup" colspan="4">{}</th>"#, esc(m));
            }
            o.push_str("</tr><tr>");
            for _ in &models {
                o.push_str(r#"<th scope="col">share</th><th scope="col">low</th><th scope="col">high</th><th scope="col">in credit rows</th>"#);
            }
            o.push_str("</tr></thead><tbody>");
            for &k in &order {
                let ch = &b.channels[k];
                let _ = write!(o, r#"<tr><th scope="row">{}</th>"#, esc(&ch.channel));
                for (mi, m) in ch.models.iter().enumerate() {
                    let p = format!("/bootstrap/channels/{k}/models/{mi}");
                    o.push_str(&cell(&format!("{p}/point"), Some(m.point), &pct(m.point), ""));
                    o.push_str(&cell(&format!("{p}/low"), Some(m.low), &pct(m.low), ""));
                    o.push_str(&cell(&format!("{p}/high"), Some(m.high), &pct(m.high), ""));
                    o.push_str(&cell(
                        &format!("{p}/credit_rows"),
                        m.credit_rows,
                        &m.credit_rows.map_or("n/a".into(), pct),
                        "",
                    ));
                }
                o.push_str("</tr>");
            }
            o.push_str("</tbody></table></div>");
            if let Some(l) = &r.bootstrap_limits {
                let _ = write!(o, r#"<p class="limits"><strong>Limits.</strong> {}</p>"#, esc(l));
            }
        }
    }
    o.push_str("</section>");

    // Lift tests.
    o.push_str(r#"<section id="lift"><h2>Model credit beside lift tests</h2>"#);
    if c.lift_tests.is_empty() {
        o.push_str(
            "<p>No experiments file was given (<code>--experiments</code>). A lift test (holdout, geo test) measures \
             how many conversions a channel added; putting each model's credit beside it is how credit is kept \
             honest.</p>",
        );
    } else {
        o.push_str(
            "<p>For each experiment: the measured incremental conversions (line) and its interval (band), and the \
             conversions each model credits to the channel in the same period. Models whose credit falls outside the \
             interval are marked. Nothing is adjusted: the comparison is shown, the decision is yours.</p>",
        );
        let rows: Vec<LiftRow> = c
            .lift_tests
            .iter()
            .map(|l| LiftRow {
                label: l.channel.clone(),
                period: period(&l.start, &l.end),
                measured: l.measured,
                low: l.low,
                high: l.high,
                models: l
                    .models
                    .iter()
                    .map(|m| {
                        let col = c.models.iter().position(|x| *x == m.model).map_or("#555555", color);
                        (m.model.clone(), col, m.credited, m.outside)
                    })
                    .collect(),
            })
            .collect();
        let title = "Credited conversions against measured lift";
        let chart = svg::lift(
            "chart-lift",
            title,
            "One row per experiment: a grey band for the experiment's interval, a black line at the measured lift, \
             and per model a marker at the conversions it credits to the channel in the period: a circle when \
             inside the interval, a diamond when outside.",
            &rows,
        );
        figure(&mut o, &chart, title);
        o.push_str(r#"<div class="table-wrap"><table id="table-lift"><caption>Credited conversions per model beside each experiment</caption><thead><tr><th scope="col">experiment</th><th scope="col">measured</th><th scope="col">low</th><th scope="col">high</th><th scope="col">model</th><th scope="col">credited</th><th scope="col">against the interval</th></tr></thead><tbody>"#);
        for (e, l) in c.lift_tests.iter().enumerate() {
            let label = format!("{}, {}", l.channel, period(&l.start, &l.end));
            for (mi, m) in l.models.iter().enumerate() {
                let _ = write!(o, r#"<tr><th scope="row" title="source: {}">{}</th>"#, esc(&l.source), esc(&label));
                o.push_str(&cell(&format!("/lift_tests/{e}/measured"), Some(l.measured), &num(l.measured, 1), ""));
                o.push_str(&cell(&format!("/lift_tests/{e}/low"), Some(l.low), &num(l.low, 1), ""));
                o.push_str(&cell(&format!("/lift_tests/{e}/high"), Some(l.high), &num(l.high, 1), ""));
                let verdict = if m.outside {
                    format!("outside ({})", if m.side == crate::lift::Side::Above { "above" } else { "below" })
                } else {
                    "inside".into()
                };
                let _ = write!(o, r#"<td class="model">{}</td>"#, esc(&m.model));
                o.push_str(&cell(
                    &format!("/lift_tests/{e}/models/{mi}/credited"),
                    Some(m.credited),
                    &num(m.credited, 1),
                    "",
                ));
                let _ = write!(
                    o,
                    r#"<td class="verdict{}" data-outside="{}">{}</td></tr>"#,
                    if m.outside { " outside" } else { "" },
                    m.outside,
                    esc(&verdict)
                );
            }
        }
        o.push_str("</tbody></table></div><ul class=\"sources\">");
        for l in &c.lift_tests {
            let _ = write!(
                o,
                "<li>{} ({}): {}; interval {}.</li>",
                esc(&l.channel),
                esc(&period(&l.start, &l.end)),
                esc(&l.source),
                esc(&l.interval)
            );
        }
        o.push_str("</ul>");
    }
    o.push_str("</section>");

    // Method.
    let _ = write!(
        o,
        r#"<section id="method" class="method"><h2>Method</h2><dl><dt>Credited conversions and value</dt><dd>The sum of each model's credit (and credited value) over its credit rows; every conversion's credit sums to 1 under every model, so each model's total equals the number of conversions. Rows are read from the files given; a row delivered twice (same conversion, model and position) counts once.</dd><dt>Difference from the baseline</dt><dd>A model's number minus the baseline's ({}); relative: that difference over the baseline's number.</dd><dt>Shift matrix</dt><dd>Per conversion, with a and b the credit the two models give each {by}: a {by} keeps min(a, b); the credit a losing {by} gives up (a − b) goes to the gaining {by}s in proportion to their gains (b − a); the cells are summed over conversions.</dd><dt>Shares of the data-driven models</dt><dd>A model fitted on a set of closed paths gives each channel its credit summed over the converting paths, divided by their number: what its credit rows would add up to, had one snapshot credited them all.</dd><dt>Bootstrap intervals</dt><dd>Closed paths are drawn with replacement, as many as there are, and shapley and markov are refitted on each resample; the interval runs between the quantiles of the resampled shares (percentile interval, Efron and Tibshirani 1993). Paths, not users, are resampled; the interval measures the stability of the fit, not causality.</dd><dt>Lift tests</dt><dd>Each model's credit to the tested channel over the conversions in the experiment's period, beside the measured incremental conversions and their interval (given, or measured ± 1.645 standard errors).</dd></dl></section>"#,
        esc(&base)
    );
    o.push_str("<footer>Made by <code>apportion compare</code> from credit and path rows. The numbers in this page are those of <code>apportion compare --format json</code> on the same input.</footer></main></body></html>\n");
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slugs() {
        assert_eq!(slug("time_decay"), "time_decay");
        assert_eq!(slug("My Model/2"), "my-model-2");
    }
}
