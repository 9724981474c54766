//! Plain-text tables and long-form CSV.

use std::fmt::Write;

use super::{num, pct, period as span, signed, signed_pct};
use crate::report::Report;

fn conversions_span(r: &Report) -> String {
    match (&r.comparison.first_conversion, &r.comparison.last_conversion) {
        (Some(a), Some(b)) => format!("{} to {}", &a[..10], &b[..10]),
        _ => "no conversions".into(),
    }
}

/// A table with a left key column and right-aligned number columns.
fn grid(out: &mut String, title: &str, head: &str, cols: &[String], rows: &[(String, Vec<String>)]) {
    let kw = rows.iter().map(|r| r.0.chars().count()).chain([head.len(), 8]).max().unwrap_or(8) + 2;
    let widths: Vec<usize> = (0..cols.len())
        .map(|i| rows.iter().map(|r| r.1[i].chars().count()).chain([cols[i].chars().count()]).max().unwrap_or(0) + 2)
        .collect();
    let _ = writeln!(out, "\n{title}");
    let _ = write!(out, "{head:<kw$}");
    for (c, w) in cols.iter().zip(&widths) {
        let _ = write!(out, "{c:>w$}");
    }
    out.push('\n');
    for (k, cells) in rows {
        let _ = write!(out, "{k:<kw$}");
        for (c, w) in cells.iter().zip(&widths) {
            let _ = write!(out, "{c:>w$}");
        }
        out.push('\n');
    }
}

/// The report as aligned plain-text tables.
pub(crate) fn table(r: &Report) -> String {
    let c = &r.comparison;
    let mut s = String::new();
    let by = c.by.as_str();
    let _ = writeln!(
        s,
        "Model comparison by {by}: {} conversions ({}), models {}; baseline {}",
        c.conversions,
        conversions_span(r),
        c.models.join(", "),
        c.baseline.as_deref().unwrap_or("none")
    );
    let cols: Vec<String> = c.models.clone();
    let currency = c.currency.clone().unwrap_or_else(|| {
        if c.currencies.is_empty() {
            "no currency".into()
        } else {
            "mixed currencies".into()
        }
    });
    let mut credit: Vec<(String, Vec<String>)> = c
        .rows
        .iter()
        .map(|row| (row.key.clone(), row.models.iter().map(|m| num(m.conversions, 2)).collect()))
        .collect();
    credit.push(("total".into(), c.model_totals.iter().map(|t| num(t.credited_conversions, 2)).collect()));
    grid(&mut s, "Conversions credited (sum of credit)", by, &cols, &credit);
    let mut value: Vec<(String, Vec<String>)> =
        c.rows.iter().map(|row| (row.key.clone(), row.models.iter().map(|m| num(m.value, 2)).collect())).collect();
    value.push(("total".into(), c.model_totals.iter().map(|t| num(t.credited_value, 2)).collect()));
    grid(&mut s, &format!("Value credited ({currency})"), by, &cols, &value);
    if let Some(base) = &c.baseline {
        let bi = c.models.iter().position(|m| m == base).expect("baseline is a model");
        let others: Vec<usize> = (0..c.models.len()).filter(|&i| i != bi).collect();
        let diff: Vec<(String, Vec<String>)> = c
            .rows
            .iter()
            .map(|row| {
                let cells = others
                    .iter()
                    .map(|&i| {
                        let m = &row.models[i];
                        let rel = m.conversions_relative.map_or("n/a".into(), signed_pct);
                        format!("{} ({rel})", signed(m.conversions_difference, 2))
                    })
                    .collect();
                (row.key.clone(), cells)
            })
            .collect();
        let ocols: Vec<String> = others.iter().map(|&i| c.models[i].clone()).collect();
        grid(&mut s, &format!("Difference from {base} in conversions (relative)"), by, &ocols, &diff);
        for sh in c.shifts.iter().filter(|sh| &sh.from_model == base) {
            let rows: Vec<(String, Vec<String>)> = c
                .keys
                .iter()
                .zip(&sh.matrix)
                .map(|(k, row)| (k.clone(), row.iter().map(|x| num(*x, 2)).collect()))
                .collect();
            grid(
                &mut s,
                &format!(
                    "Credit moving from {base} (rows) to {} (columns); diagonal: kept; {} moved in all",
                    sh.to_model,
                    num(sh.moved, 2)
                ),
                by,
                &c.keys,
                &rows,
            );
        }
        let _ = writeln!(s, "\n(The JSON output has the shift matrix of every pair of models.)");
    }
    if let Some(b) = &r.bootstrap {
        let cols: Vec<String> = b.channels.first().map_or(Vec::new(), |ch| {
            ch.models.iter().map(|m| format!("{} share [{:.0}% interval]", m.model, b.level * 100.0)).collect()
        });
        let mut order: Vec<&crate::bootstrap::ChannelShares> = b.channels.iter().collect();
        order.sort_by(|x, y| {
            let p = |c: &crate::bootstrap::ChannelShares| c.models.first().map_or(0.0, |m| m.point);
            p(y).total_cmp(&p(x)).then(x.channel.cmp(&y.channel))
        });
        let rows: Vec<(String, Vec<String>)> = order
            .iter()
            .map(|ch| {
                let cells =
                    ch.models.iter().map(|m| format!("{} [{}, {}]", pct(m.point), pct(m.low), pct(m.high))).collect();
                (ch.channel.clone(), cells)
            })
            .collect();
        grid(&mut s, &format!("Data-driven shares: {}", b.method), "channel", &cols, &rows);
        if let Some(l) = &r.bootstrap_limits {
            let _ = writeln!(s, "{l}");
        }
    }
    if !c.lift_tests.is_empty() {
        let _ = writeln!(s, "\nLift tests: each model's credited conversions beside the measured lift");
        for l in &c.lift_tests {
            let _ = writeln!(
                s,
                "\n{}, {} (source: {}): measured {} [{}, {}], {}",
                l.channel,
                span(&l.start, &l.end),
                l.source,
                num(l.measured, 1),
                num(l.low, 1),
                num(l.high, 1),
                l.interval
            );
            for m in &l.models {
                let mark = if m.outside { format!("OUTSIDE ({:?})", m.side).to_lowercase() } else { "inside".into() };
                let _ = writeln!(s, "  {:<14}{:>12}  {}", m.model, num(m.credited, 1), mark);
            }
        }
    }
    if !r.notes.is_empty() {
        let _ = writeln!(s, "\nNotes");
        for n in &r.notes {
            let _ = writeln!(s, "- {n}");
        }
    }
    let _ = writeln!(s, "\nBefore you use these numbers");
    for n in &r.cautions {
        let _ = writeln!(s, "- {n}");
    }
    s
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

fn opt(x: Option<f64>) -> String {
    x.map_or(String::new(), |v| v.to_string())
}

/// The report as long-form CSV, one number per line.
pub(crate) fn csv(r: &Report) -> String {
    let c = &r.comparison;
    let mut s = String::from("section,model,other_model,key,other_key,metric,value\n");
    let mut line = |section: &str, model: &str, other: &str, key: &str, other_key: &str, metric: &str, v: String| {
        let f: Vec<String> = [section, model, other, key, other_key, metric].iter().map(|x| csv_field(x)).collect();
        let _ = writeln!(s, "{},{v}", f.join(","));
    };
    let base = c.baseline.as_deref().unwrap_or("");
    for t in &c.model_totals {
        line("model_total", &t.model, "", "", "", "conversions", t.conversions.to_string());
        line("model_total", &t.model, "", "", "", "credited_conversions", t.credited_conversions.to_string());
        line("model_total", &t.model, "", "", "", "credited_value", t.credited_value.to_string());
    }
    for row in &c.rows {
        for m in &row.models {
            line("credit", &m.model, base, &row.key, "", "conversions", m.conversions.to_string());
            line("credit", &m.model, base, &row.key, "", "value", m.value.to_string());
            line("credit", &m.model, base, &row.key, "", "share", m.share.to_string());
            line(
                "credit",
                &m.model,
                base,
                &row.key,
                "",
                "conversions_difference",
                m.conversions_difference.to_string(),
            );
            line("credit", &m.model, base, &row.key, "", "conversions_relative", opt(m.conversions_relative));
            line("credit", &m.model, base, &row.key, "", "value_difference", m.value_difference.to_string());
            line("credit", &m.model, base, &row.key, "", "value_relative", opt(m.value_relative));
        }
    }
    for sh in &c.shifts {
        for (i, from) in c.keys.iter().enumerate() {
            for (j, to) in c.keys.iter().enumerate() {
                line("shift", &sh.from_model, &sh.to_model, from, to, "credit", sh.matrix[i][j].to_string());
            }
        }
    }
    if let Some(b) = &r.bootstrap {
        for ch in &b.channels {
            for m in &ch.models {
                line("bootstrap", &m.model, "", &ch.channel, "", "point", m.point.to_string());
                line("bootstrap", &m.model, "", &ch.channel, "", "low", m.low.to_string());
                line("bootstrap", &m.model, "", &ch.channel, "", "high", m.high.to_string());
                line("bootstrap", &m.model, "", &ch.channel, "", "credit_rows", opt(m.credit_rows));
            }
        }
    }
    for l in &c.lift_tests {
        let period = format!("{}/{}", l.start, l.end);
        line("lift", "", "", &l.channel, &period, "measured", l.measured.to_string());
        line("lift", "", "", &l.channel, &period, "low", l.low.to_string());
        line("lift", "", "", &l.channel, &period, "high", l.high.to_string());
        for m in &l.models {
            line("lift", &m.model, "", &l.channel, &period, "credited", m.credited.to_string());
            line("lift", &m.model, "", &l.channel, &period, "outside", u8::from(m.outside).to_string());
        }
    }
    s
}
