//! SVG charts written as text: grouped bars, a heat map, interval bars and
//! the lift-test chart. Each chart is an `<svg role="img">` with a
//! `<title>` and `<desc>`, and every mark has a `<title>` tooltip naming
//! its number, so the chart reads without colour; the data tables under the
//! charts carry the exact numbers.
//!
//! Colours: the Okabe-Ito palette (Okabe and Ito 2008, "Color Universal
//! Design"), chosen to stay distinguishable with the common forms of colour
//! blindness; the heat map uses one hue from light to dark, so it reads by
//! lightness alone. Where a colour carries a yes/no (inside or outside a
//! lift test's interval), a shape carries it too.

use std::fmt::Write;

use super::num;

/// Series colours, in order: the Okabe-Ito colours (Okabe and Ito 2008)
/// with a dark grey in place of black, and yellow last because it is the
/// faintest on white; every bar has a dark outline.
pub(crate) const PALETTE: [&str; 8] =
    ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#4D4D4D", "#F0E442"];

/// The colour of series `i`.
pub(crate) fn color(i: usize) -> &'static str {
    PALETTE[i % PALETTE.len()]
}

/// Escapes text for HTML and SVG (content and attribute values).
pub(crate) fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

/// At most `max` characters, with an ellipsis when cut.
fn short(s: &str, max: usize) -> String {
    if s.chars().count() <= max {
        s.to_string()
    } else {
        let mut t: String = s.chars().take(max.saturating_sub(1)).collect();
        t.push('…');
        t
    }
}

/// A tick step of 1, 2 or 5 times a power of ten, giving about `n` ticks.
fn nice_step(range: f64, n: usize) -> f64 {
    if range <= 0.0 || !range.is_finite() {
        return 1.0;
    }
    let raw = range / n.max(1) as f64;
    let p = 10f64.powf(raw.log10().floor());
    let f = raw / p;
    p * if f <= 1.0 {
        1.0
    } else if f <= 2.0 {
        2.0
    } else if f <= 5.0 {
        5.0
    } else {
        10.0
    }
}

/// Axis bounds widened to whole steps, and the ticks.
fn axis(lo: f64, hi: f64, n: usize) -> (f64, f64, Vec<f64>) {
    let (lo, hi) = if hi > lo { (lo, hi) } else { (lo, lo + 1.0) };
    let step = nice_step(hi - lo, n);
    let a = (lo / step).floor() * step;
    let b = (hi / step).ceil() * step;
    let count = ((b - a) / step).round() as usize;
    let ticks = (0..=count).map(|i| a + i as f64 * step).collect();
    (a, b, ticks)
}

fn tick_label(v: f64, step_decimals: usize, percent: bool) -> String {
    if percent {
        format!("{}%", num(v * 100.0, step_decimals.saturating_sub(2)))
    } else {
        num(v, step_decimals)
    }
}

fn decimals_for(ticks: &[f64]) -> usize {
    let step = if ticks.len() > 1 { ticks[1] - ticks[0] } else { 1.0 };
    if step >= 1.0 {
        0
    } else {
        (-step.log10()).ceil() as usize
    }
}

fn open(o: &mut String, id: &str, w: f64, h: f64, title: &str, desc: &str) {
    let _ = write!(
        o,
        r#"<svg id="{id}" class="chart" role="img" aria-labelledby="{id}-title {id}-desc" viewBox="0 0 {w:.0} {h:.0}" width="{w:.0}" height="{h:.0}" xmlns="http://www.w3.org/2000/svg"><title id="{id}-title">{}</title><desc id="{id}-desc">{}</desc>"#,
        esc(title),
        esc(desc)
    );
}

/// A legend of coloured squares in rows; returns its height.
fn legend(o: &mut String, x0: f64, y0: f64, width: f64, items: &[(String, &str)]) -> f64 {
    let (mut x, mut y) = (x0, y0);
    for (name, c) in items {
        let w = 26.0 + 7.0 * name.chars().count() as f64 + 18.0;
        if x + w > x0 + width && x > x0 {
            x = x0;
            y += 20.0;
        }
        let _ = write!(
            o,
            r##"<g class="legend-item"><rect x="{x:.1}" y="{:.1}" width="14" height="14" fill="{c}" stroke="#333" stroke-width="0.6"/><text x="{:.1}" y="{:.1}" font-size="13">{}</text></g>"##,
            y,
            x + 20.0,
            y + 11.5,
            esc(name)
        );
        x += w;
    }
    y - y0 + 22.0
}

/// Grouped bars: one group per category, one bar per series.
pub(crate) struct Bars<'a> {
    pub id: &'a str,
    pub title: &'a str,
    pub desc: &'a str,
    pub categories: &'a [String],
    pub series: &'a [(String, &'static str)],
    /// `values[category][series]`.
    pub values: &'a [Vec<f64>],
    pub axis_label: &'a str,
    pub decimals: usize,
}

/// Grouped bar chart (negative values go below the zero line).
pub(crate) fn bars(b: &Bars) -> String {
    let ns = b.series.len().max(1);
    let nc = b.categories.len().max(1);
    let (left, right) = (76.0, 16.0);
    let width = (960.0f64).max(left + right + (nc * ns) as f64 * 7.0 + nc as f64 * 8.0);
    let plot_w = width - left - right;
    let gw = plot_w / nc as f64;
    let labels: Vec<String> = b.categories.iter().map(|c| short(c, 28)).collect();
    let longest = labels.iter().map(|l| l.chars().count()).max().unwrap_or(0) as f64;
    let rotate = longest * 7.0 > gw - 6.0;
    let bottom = if rotate { (34.0 + longest * 7.0 * 0.6).min(190.0) } else { 40.0 };
    let mut o = String::new();
    let mut lg = String::new();
    let lh = legend(&mut lg, left, 8.0, plot_w, b.series);
    let top = 8.0 + lh + 8.0;
    let plot_h = 280.0;
    let height = top + plot_h + bottom;
    open(&mut o, b.id, width, height, b.title, b.desc);
    o.push_str(&lg);
    let all = b.values.iter().flatten().copied().filter(|v| v.is_finite());
    let (mn, mx) = all.fold((0.0f64, 0.0f64), |(a, z), v| (a.min(v), z.max(v)));
    let (lo, hi, ticks) = axis(mn, mx, 5);
    let td = decimals_for(&ticks);
    let y = |v: f64| top + plot_h * (hi - v) / (hi - lo);
    for t in &ticks {
        let _ = write!(
            o,
            r##"<line x1="{left}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="#e1e1e1"/><text x="{:.1}" y="{:.1}" font-size="12" text-anchor="end">{}</text>"##,
            left + plot_w,
            y(*t),
            y(*t),
            left - 6.0,
            y(*t) + 4.0,
            tick_label(*t, td, false)
        );
    }
    let _ = write!(
        o,
        r#"<text transform="translate(16 {:.1}) rotate(-90)" font-size="12" text-anchor="middle">{}</text>"#,
        top + plot_h / 2.0,
        esc(b.axis_label)
    );
    let bw = gw * 0.8 / ns as f64;
    for (ci, cat) in b.categories.iter().enumerate() {
        let gx = left + ci as f64 * gw + gw * 0.1;
        for (si, (name, c)) in b.series.iter().enumerate() {
            let v = b.values[ci][si];
            let (y0, y1) = (y(0.0), y(v));
            let _ = write!(
                o,
                r##"<rect class="bar" x="{:.2}" y="{:.2}" width="{:.2}" height="{:.2}" fill="{c}" stroke="#333" stroke-width="0.5"><title>{}: {} {}</title></rect>"##,
                gx + si as f64 * bw,
                y0.min(y1),
                (bw - 1.0).max(1.0),
                (y1 - y0).abs(),
                esc(cat),
                esc(name),
                num(v, b.decimals)
            );
        }
        let lx = left + ci as f64 * gw + gw / 2.0;
        let ly = top + plot_h + 16.0;
        if rotate {
            let _ = write!(
                o,
                r#"<text transform="translate({lx:.1} {ly:.1}) rotate(-35)" font-size="12" text-anchor="end">{}<title>{}</title></text>"#,
                esc(&labels[ci]),
                esc(cat)
            );
        } else {
            let _ = write!(
                o,
                r#"<text x="{lx:.1}" y="{ly:.1}" font-size="12" text-anchor="middle">{}</text>"#,
                esc(&labels[ci])
            );
        }
    }
    let _ = write!(
        o,
        r##"<line x1="{left}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="#333" stroke-width="1.2"/></svg>"##,
        left + plot_w,
        y(0.0),
        y(0.0)
    );
    o
}

/// A heat map of a square matrix with its numbers in the cells.
pub(crate) struct Heat<'a> {
    pub id: &'a str,
    pub title: &'a str,
    pub desc: &'a str,
    pub keys: &'a [String],
    pub matrix: &'a [Vec<f64>],
    pub from: &'a str,
    pub to: &'a str,
}

/// Light to dark in one hue, `t` in [0, 1].
fn blue(t: f64) -> String {
    let t = t.clamp(0.0, 1.0);
    let (a, b) = ([247.0, 251.0, 255.0], [8.0, 48.0, 107.0]);
    let c: Vec<u8> = (0..3).map(|i| (a[i] + (b[i] - a[i]) * t).round() as u8).collect();
    format!("#{:02x}{:02x}{:02x}", c[0], c[1], c[2])
}

/// Heat map (rows: `from` model, columns: `to` model).
pub(crate) fn heat(h: &Heat) -> String {
    let n = h.keys.len().max(1);
    let labels: Vec<String> = h.keys.iter().map(|k| short(k, 26)).collect();
    let longest = labels.iter().map(|l| l.chars().count()).max().unwrap_or(4) as f64;
    let lw = (longest * 7.0 + 24.0).clamp(60.0, 210.0);
    let cell = ((880.0 - lw) / n as f64).clamp(22.0, 68.0);
    let top_labels = (longest * 7.0 * 0.72 + 40.0).clamp(60.0, 190.0);
    let width = (lw + n as f64 * cell + 24.0).max(420.0);
    let top = 22.0 + top_labels;
    let height = top + n as f64 * cell + 70.0;
    let max_off = h
        .matrix
        .iter()
        .enumerate()
        .flat_map(|(i, r)| r.iter().enumerate().filter(move |(j, _)| *j != i).map(|(_, v)| *v))
        .fold(0.0f64, f64::max);
    let mut o = String::new();
    open(&mut o, h.id, width, height, h.title, h.desc);
    let _ = write!(
        o,
        r#"<text x="{lw:.1}" y="16" font-size="13">columns: credit under {} · rows: credit under {}</text>"#,
        esc(h.to),
        esc(h.from)
    );
    let fs = (cell * 0.3).clamp(8.0, 13.0);
    let decimals = if max_off >= 100.0 { 0 } else { 1 };
    for (j, l) in labels.iter().enumerate() {
        let x = lw + j as f64 * cell + cell / 2.0;
        let _ = write!(
            o,
            r#"<text transform="translate({:.1} {:.1}) rotate(-45)" font-size="12">{}<title>{}</title></text>"#,
            x - 2.0,
            top - 6.0,
            esc(l),
            esc(&h.keys[j])
        );
    }
    for (i, row) in h.matrix.iter().enumerate() {
        let y = top + i as f64 * cell;
        let _ = write!(
            o,
            r#"<text x="{:.1}" y="{:.1}" font-size="12" text-anchor="end">{}<title>{}</title></text>"#,
            lw - 6.0,
            y + cell / 2.0 + 4.0,
            esc(&labels[i]),
            esc(&h.keys[i])
        );
        for (j, &v) in row.iter().enumerate() {
            let x = lw + j as f64 * cell;
            let diag = i == j;
            let t = if diag || max_off <= 0.0 { 0.0 } else { v / max_off };
            let fill = if diag { "#e4e4e4".to_string() } else { blue(t) };
            let ink = if t > 0.5 { "#ffffff" } else { "#1a1a1a" };
            let what = if diag {
                format!("{} keeps {}", h.keys[i], num(v, 2))
            } else {
                format!("{} moves from {} to {}", num(v, 2), h.keys[i], h.keys[j])
            };
            let _ = write!(
                o,
                r##"<g class="cell"><rect x="{x:.1}" y="{y:.1}" width="{cell:.1}" height="{cell:.1}" fill="{fill}" stroke="#ffffff" stroke-width="1"/><text x="{:.1}" y="{:.1}" font-size="{fs:.1}" text-anchor="middle" fill="{ink}"{}>{}</text><title>{}</title></g>"##,
                x + cell / 2.0,
                y + cell / 2.0 + fs * 0.35,
                if diag { r#" font-style="italic""# } else { "" },
                num(v, decimals),
                esc(&what)
            );
        }
    }
    // Scale: light to dark for 0 .. the largest move; the diagonal is grey.
    let sy = top + n as f64 * cell + 22.0;
    let gid = format!("{}-scale", h.id);
    let _ = write!(
        o,
        r##"<defs><linearGradient id="{gid}"><stop offset="0" stop-color="{}"/><stop offset="1" stop-color="{}"/></linearGradient></defs><rect x="{lw:.1}" y="{sy:.1}" width="160" height="12" fill="url(#{gid})" stroke="#999"/><text x="{lw:.1}" y="{:.1}" font-size="11">0</text><text x="{:.1}" y="{:.1}" font-size="11" text-anchor="end">{} (largest move)</text><rect x="{:.1}" y="{sy:.1}" width="12" height="12" fill="#e4e4e4" stroke="#999"/><text x="{:.1}" y="{:.1}" font-size="11">kept (diagonal, italic)</text></svg>"##,
        blue(0.0),
        blue(1.0),
        sy + 26.0,
        lw + 160.0,
        sy + 26.0,
        num(max_off, 2),
        lw + 190.0,
        lw + 208.0,
        sy + 10.0
    );
    o
}

/// Interval bars: per row, one line per series from low to high with a
/// dot at the point value.
pub(crate) struct Intervals<'a> {
    pub id: &'a str,
    pub title: &'a str,
    pub desc: &'a str,
    pub rows: &'a [String],
    pub series: &'a [(String, &'static str)],
    /// `values[row][series] = (point, low, high)`.
    pub values: &'a [Vec<(f64, f64, f64)>],
}

/// Horizontal interval chart on a 0..max share axis (percent).
pub(crate) fn intervals(c: &Intervals) -> String {
    let ns = c.series.len().max(1);
    let labels: Vec<String> = c.rows.iter().map(|k| short(k, 26)).collect();
    let longest = labels.iter().map(|l| l.chars().count()).max().unwrap_or(4) as f64;
    let lw = (longest * 7.0 + 24.0).clamp(70.0, 210.0);
    let width = 960.0;
    let plot_w = width - lw - 24.0;
    let mut lg = String::new();
    let lh = legend(&mut lg, lw, 8.0, plot_w, c.series);
    let top = 8.0 + lh + 6.0;
    let rh = 16.0 * ns as f64 + 14.0;
    let height = top + rh * c.rows.len() as f64 + 40.0;
    let mx = c.values.iter().flatten().map(|v| v.2.max(v.0)).fold(0.0f64, f64::max);
    let (_, hi, ticks) = axis(0.0, mx.max(0.01), 5);
    let td = decimals_for(&ticks);
    let x = |v: f64| lw + plot_w * v / hi;
    let mut o = String::new();
    open(&mut o, c.id, width, height, c.title, c.desc);
    o.push_str(&lg);
    let bottom = top + rh * c.rows.len() as f64;
    for t in &ticks {
        let _ = write!(
            o,
            r##"<line x1="{:.1}" x2="{:.1}" y1="{top:.1}" y2="{bottom:.1}" stroke="#e1e1e1"/><text x="{:.1}" y="{:.1}" font-size="12" text-anchor="middle">{}</text>"##,
            x(*t),
            x(*t),
            x(*t),
            bottom + 16.0,
            tick_label(*t, td, true)
        );
    }
    for (r, name) in c.rows.iter().enumerate() {
        let y0 = top + r as f64 * rh;
        if r % 2 == 1 {
            let _ = write!(o, r##"<rect x="0" y="{y0:.1}" width="{width}" height="{rh:.1}" fill="#f6f6f6"/>"##);
        }
        let _ = write!(
            o,
            r#"<text x="{:.1}" y="{:.1}" font-size="12" text-anchor="end">{}<title>{}</title></text>"#,
            lw - 8.0,
            y0 + rh / 2.0 + 4.0,
            esc(&labels[r]),
            esc(name)
        );
        for (si, (sname, col)) in c.series.iter().enumerate() {
            let (p, lo, hi_v) = c.values[r][si];
            let y = y0 + 14.0 + si as f64 * 16.0;
            let _ = write!(
                o,
                r##"<g class="interval"><line x1="{:.1}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="{col}" stroke-width="3"/><line x1="{:.1}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="{col}" stroke-width="2"/><line x1="{:.1}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="{col}" stroke-width="2"/><circle cx="{:.1}" cy="{y:.1}" r="4.5" fill="{col}" stroke="#333" stroke-width="1"/><title>{} {}: {} [{}, {}]</title></g>"##,
                x(lo),
                x(hi_v),
                x(lo),
                x(lo),
                y - 5.0,
                y + 5.0,
                x(hi_v),
                x(hi_v),
                y - 5.0,
                y + 5.0,
                x(p),
                esc(name),
                esc(sname),
                super::pct(p),
                super::pct(lo),
                super::pct(hi_v)
            );
        }
    }
    o.push_str("</svg>");
    o
}

/// One experiment of the lift chart.
pub(crate) struct LiftRow {
    pub label: String,
    pub period: String,
    pub measured: f64,
    pub low: f64,
    pub high: f64,
    /// (model, colour, credited, outside).
    pub models: Vec<(String, &'static str, f64, bool)>,
}

/// Lift tests: the experiment's interval as a band, the measurement as a
/// line, each model's credit as a marker (circle inside, diamond outside).
pub(crate) fn lift(id: &str, title: &str, desc: &str, rows: &[LiftRow]) -> String {
    let labels: Vec<String> = rows.iter().map(|r| short(&r.label, 30)).collect();
    let longest = labels.iter().chain(rows.iter().map(|r| &r.period)).map(|l| l.chars().count().min(40)).max();
    let lw = (longest.unwrap_or(4) as f64 * 6.6 + 24.0).clamp(70.0, 280.0);
    let width = 960.0;
    let plot_w = width - lw - 110.0;
    let top = 34.0;
    let heights: Vec<f64> = rows.iter().map(|r| 16.0 * r.models.len() as f64 + 16.0).collect();
    let total: f64 = heights.iter().sum();
    let height = top + total + 44.0;
    let vals = rows.iter().flat_map(|r| [r.low, r.high, r.measured].into_iter().chain(r.models.iter().map(|m| m.2)));
    let (mn, mx) = vals.fold((0.0f64, 0.0f64), |(a, z), v| (a.min(v), z.max(v)));
    let (lo, hi, ticks) = axis(mn, mx, 6);
    let td = decimals_for(&ticks);
    let x = |v: f64| lw + plot_w * (v - lo) / (hi - lo);
    let mut o = String::new();
    open(&mut o, id, width, height, title, desc);
    let _ = write!(
        o,
        r##"<g font-size="12"><rect x="{lw:.1}" y="8" width="26" height="12" fill="#d9d9d9" stroke="#8c8c8c"/><text x="{:.1}" y="18">experiment's interval</text><line x1="{:.1}" x2="{:.1}" y1="6" y2="22" stroke="#000" stroke-width="2"/><text x="{:.1}" y="18">measured</text><circle cx="{:.1}" cy="14" r="5" fill="#777"/><text x="{:.1}" y="18">model inside</text><path d="M{:.1} 8 l6 6 l-6 6 l-6 -6 z" fill="#fff" stroke="#000" stroke-width="1.5"/><text x="{:.1}" y="18">model outside</text></g>"##,
        lw + 32.0,
        lw + 190.0,
        lw + 190.0,
        lw + 198.0,
        lw + 290.0,
        lw + 300.0,
        lw + 410.0,
        lw + 420.0
    );
    let bottom = top + total;
    for t in &ticks {
        let _ = write!(
            o,
            r##"<line x1="{:.1}" x2="{:.1}" y1="{top:.1}" y2="{bottom:.1}" stroke="#e1e1e1"/><text x="{:.1}" y="{:.1}" font-size="12" text-anchor="middle">{}</text>"##,
            x(*t),
            x(*t),
            x(*t),
            bottom + 16.0,
            tick_label(*t, td, false)
        );
    }
    let _ = write!(
        o,
        r#"<text x="{:.1}" y="{:.1}" font-size="12" text-anchor="middle">conversions</text>"#,
        lw + plot_w / 2.0,
        bottom + 34.0
    );
    let mut y0 = top;
    for (r, row) in rows.iter().enumerate() {
        let h = heights[r];
        let _ = write!(
            o,
            r##"<rect class="band" x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="#d9d9d9" stroke="#8c8c8c"><title>{}: interval {} to {}</title></rect><line x1="{:.1}" x2="{:.1}" y1="{:.1}" y2="{:.1}" stroke="#000" stroke-width="2"><title>measured {}</title></line><text x="{:.1}" y="{:.1}" font-size="12" font-weight="600" text-anchor="end">{}<title>{}</title></text><text x="{:.1}" y="{:.1}" font-size="11" text-anchor="end">{}</text>"##,
            x(row.low),
            y0 + 3.0,
            (x(row.high) - x(row.low)).max(1.0),
            h - 6.0,
            esc(&row.label),
            num(row.low, 1),
            num(row.high, 1),
            x(row.measured),
            x(row.measured),
            y0 + 1.0,
            y0 + h - 1.0,
            num(row.measured, 1),
            lw - 8.0,
            y0 + h / 2.0 - 3.0,
            esc(&labels[r]),
            esc(&row.label),
            lw - 8.0,
            y0 + h / 2.0 + 12.0,
            esc(&short(&row.period, 40))
        );
        for (i, (model, col, v, outside)) in row.models.iter().enumerate() {
            let (cx, cy) = (x(*v), y0 + 14.0 + i as f64 * 16.0);
            let mark = if *outside {
                format!(
                    r##"<path d="M{cx:.1} {:.1} l6 6 l-6 6 l-6 -6 z" fill="{col}" stroke="#000" stroke-width="1.5"/>"##,
                    cy - 6.0
                )
            } else {
                format!(r##"<circle cx="{cx:.1}" cy="{cy:.1}" r="5" fill="{col}" stroke="#333" stroke-width="1"/>"##)
            };
            let _ = write!(
                o,
                r#"<g class="lift-model">{mark}<text x="{:.1}" y="{:.1}" font-size="11">{}{}</text><title>{}: {} credits {} ({})</title></g>"#,
                cx + 9.0,
                cy + 4.0,
                esc(model),
                if *outside { " (outside)" } else { "" },
                esc(&row.label),
                esc(model),
                num(*v, 1),
                if *outside { "outside the interval" } else { "inside the interval" }
            );
        }
        y0 += h;
    }
    o.push_str("</svg>");
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn axis_steps() {
        // 1-2-5 steps (common practice, no source).
        assert_eq!(nice_step(100.0, 5), 20.0);
        assert_eq!(nice_step(0.9, 5), 0.2);
        let (a, b, t) = axis(-3.0, 47.0, 5);
        assert_eq!((a, b), (-10.0, 50.0));
        assert_eq!(t.len(), 7);
    }

    #[test]
    fn text_is_escaped() {
        assert_eq!(esc(r#"<a href="x">&'"#), "&lt;a href=&quot;x&quot;&gt;&amp;&#39;");
        assert_eq!(short("abcdef", 4), "abc…");
    }
}
