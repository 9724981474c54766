//! The comparison report in a real browser: Debian's `chromium`, headless.
//!
//! `apportion demo` writes its report; `apportion compare` writes the same
//! comparison with a lift-test section as HTML and as JSON. Chromium opens
//! the HTML from disk (no network: the page fetches nothing), a copy of it
//! gets a measuring script so the DOM dump carries each chart's and
//! table's rendered size, and a screenshot of each page is kept under
//! `target/test-artifacts/`. The checks: every chart (an `<svg>` with its
//! id) and every table is in the DOM, laid out at a real size, with as
//! many marks as the data has; and every number in the tables equals the
//! JSON output (the cell's `data-path` is a JSON pointer, RFC 6901).
//!
//! Without chromium the test prints why it is skipped, unless
//! `APPORTION_REQUIRE_SERVERS` is set (scripts/test.sh installs chromium
//! and sets it), in which case it fails.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use apportion_e2e::{bin, KEY};
use serde_json::Value;

/// The browser, when installed.
fn chromium() -> Option<PathBuf> {
    for name in ["chromium", "chromium-browser"] {
        if let Ok(o) = Command::new(name).arg("--version").output() {
            if o.status.success() {
                return Some(PathBuf::from(name));
            }
        }
    }
    if std::env::var_os("APPORTION_REQUIRE_SERVERS").is_some() {
        panic!("chromium is not installed but APPORTION_REQUIRE_SERVERS is set: scripts/test.sh installs it");
    }
    eprintln!("skipped: chromium not installed (scripts/test.sh installs Debian's chromium)");
    None
}

/// Runs headless chromium on a local page with a fresh profile; returns
/// what it printed on stdout.
fn headless(browser: &Path, extra: &[String], page: &Path) -> String {
    let profile = tempfile::tempdir().unwrap();
    let out_file = profile.path().join("stdout");
    let mut child = Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.path().join("profile").display()))
        .args(extra)
        .arg(format!("file://{}", page.display()))
        .stdin(Stdio::null())
        .stdout(std::fs::File::create(&out_file).unwrap())
        .stderr(Stdio::null())
        .spawn()
        .expect("start chromium");
    let start = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if start.elapsed() > Duration::from_secs(120) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within 120 s on {}", page.display());
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    assert!(status.success(), "chromium exited with {status} on {}", page.display());
    std::fs::read_to_string(out_file).unwrap()
}

fn apportion(args: &[&str]) -> String {
    let o = Command::new(bin()).args(args).env("APPORTION_PSEUDONYM_KEY", KEY).output().unwrap();
    assert!(o.status.success(), "apportion {args:?}: {}", String::from_utf8_lossy(&o.stderr));
    String::from_utf8(o.stdout).unwrap()
}

/// Finds `name="..."` in a start tag.
fn attr<'a>(tag: &'a str, name: &str) -> Option<&'a str> {
    let start = tag.find(&format!(" {name}=\""))? + name.len() + 3;
    let len = tag[start..].find('"')?;
    Some(&tag[start..start + len])
}

/// The start tag of the element with this id.
fn element<'a>(dom: &'a str, tag: &str, id: &str) -> Option<(usize, &'a str)> {
    let at = dom.find(&format!("<{tag} id=\"{id}\""))?;
    let end = at + dom[at..].find('>')?;
    Some((at, &dom[at..end]))
}

/// The rendered size the measuring script wrote on an element.
fn size(tag: &str) -> (u32, u32) {
    let b = attr(tag, "data-box").expect("measured by the script");
    let (w, h) = b.split_once('x').unwrap();
    (w.parse().unwrap(), h.parse().unwrap())
}

/// Checks every numeric cell of one table against the JSON report; returns
/// how many there were.
fn check_table(dom: &str, id: &str, json: &Value) -> usize {
    let (at, _) = element(dom, "table", id).unwrap_or_else(|| panic!("table {id} missing"));
    let body = &dom[at..at + dom[at..].find("</table>").unwrap()];
    let mut n = 0;
    for piece in body.split("<td").skip(1) {
        let tag = &piece[..piece.find('>').unwrap()];
        let Some(path) = attr(tag, "data-path") else { continue };
        let shown = &piece[tag.len() + 1..piece.find("</td>").unwrap()];
        let want = json.pointer(path).unwrap_or_else(|| panic!("{id}: {path} is not in the JSON output"));
        let value = attr(tag, "data-value").unwrap();
        if value == "null" {
            assert!(want.is_null(), "{id}: {path}");
            assert_eq!(shown, "n/a", "{id}: {path}");
        } else {
            let v: f64 = value.parse().unwrap();
            assert_eq!(Some(v), want.as_f64(), "{id}: {path}: the table's value is not the JSON's");
            let percent = shown.ends_with('%');
            let text = shown.trim_end_matches('%').trim_start_matches('+');
            let decimals = text.split('.').nth(1).map_or(0, str::len) as i32;
            let x: f64 = text.parse().unwrap_or_else(|_| panic!("{id}: {path}: {shown:?} is not a number"));
            let scaled = if percent { v * 100.0 } else { v };
            assert!((x - scaled).abs() <= 0.5 * 10f64.powi(-decimals) + 1e-9, "{id}: {path}: shows {shown}, JSON {v}");
        }
        n += 1;
    }
    assert!(n > 0, "{id} has no numbers");
    n
}

/// A PNG's width and height (IHDR, the first chunk; PNG specification,
/// ISO/IEC 15948, 11.2.2).
fn png_size(bytes: &[u8]) -> (u32, u32) {
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "not a PNG");
    assert_eq!(&bytes[12..16], b"IHDR");
    let be = |b: &[u8]| u32::from_be_bytes(b.try_into().unwrap());
    (be(&bytes[16..20]), be(&bytes[20..24]))
}

/// Opens one report in the browser: screenshot saved as `shot`, DOM of a
/// measured copy returned.
fn render(browser: &Path, page: &Path, shot: &Path) -> String {
    headless(browser, &[format!("--screenshot={}", shot.display()), "--window-size=1280,2400".into()], page);
    let png = std::fs::read(shot).expect("screenshot written");
    assert_eq!(png_size(&png), (1280, 2400));
    // A blank page of this size compresses to about 9 KB (measured); the
    // report's first screen, charts and text, to well over 100 KB.
    assert!(png.len() > 60_000, "{} looks blank: {} bytes", shot.display(), png.len());
    let html = std::fs::read_to_string(page).unwrap();
    assert!(!html.contains("<script"), "the report itself runs no script");
    let measure = r#"<script>for (const el of document.querySelectorAll("svg.chart, table")) { const r = el.getBoundingClientRect(); el.setAttribute("data-box", Math.round(r.width) + "x" + Math.round(r.height)); } document.body.setAttribute("data-measured", "yes"); document.body.setAttribute("data-height", Math.ceil(document.documentElement.scrollHeight));</script></body>"#;
    let copy = page.with_extension("measure.html");
    std::fs::write(&copy, html.replace("</body>", measure)).unwrap();
    let dom = headless(browser, &["--window-size=1280,2400".into(), "--dump-dom".into()], &copy);
    assert!(dom.contains(r#"data-measured="yes""#), "the DOM dump is not of the loaded page");
    // Nothing dropped or moved by the parser: as many number cells as written.
    assert_eq!(dom.matches("<td data-path=").count(), html.matches("<td data-path=").count());
    dom
}

/// Every chart and table of a report: present, in order, laid out at a real
/// size, with a mark per number; every table number equal to the JSON.
fn check_report(dom: &str, json: &Value, with_lift: bool) {
    let models: Vec<&str> = json["models"].as_array().unwrap().iter().map(|m| m.as_str().unwrap()).collect();
    let keys = json["keys"].as_array().unwrap().len();
    let baseline = json["baseline"].as_str().unwrap();
    let others: Vec<&str> = models.iter().copied().filter(|m| *m != baseline).collect();
    let channels = json["bootstrap"]["channels"].as_array().unwrap().len();
    // (chart id, its table ids, marks the chart must have: (class, count)).
    let mut parts: Vec<(String, Vec<String>, &str, usize)> = vec![
        ("credit".into(), vec!["credit".into()], r#"class="bar""#, keys * models.len()),
        ("value".into(), vec!["value".into()], r#"class="bar""#, keys * models.len()),
        (
            "difference".into(),
            vec!["difference".into(), "value-difference".into()],
            r#"class="bar""#,
            keys * others.len(),
        ),
        ("bootstrap".into(), vec!["bootstrap".into()], r#"class="interval""#, channels * 2),
    ];
    for m in &others {
        parts.push((format!("shift-{m}"), vec![format!("shift-{m}")], r#"class="cell""#, keys * keys));
    }
    let experiments = json["lift_tests"].as_array().unwrap().len();
    if with_lift {
        assert!(experiments > 0);
        parts.push(("lift".into(), vec!["lift".into()], r#"class="lift-model""#, experiments * models.len()));
    } else {
        assert_eq!(experiments, 0);
        assert!(element(dom, "svg", "chart-lift").is_none());
        assert!(dom.contains("No experiments file was given"));
    }
    let mut cells = 0;
    for (chart, tables, mark, count) in &parts {
        let id = format!("chart-{chart}");
        let (at, tag) = element(dom, "svg", &id).unwrap_or_else(|| panic!("chart {id} missing"));
        assert_eq!(attr(tag, "role"), Some("img"), "{id}");
        let (w, h) = size(tag);
        assert!(w >= 300 && h >= 100, "{id} rendered at {w}x{h}");
        let svg = &dom[at..at + dom[at..].find("</svg>").unwrap()];
        assert!(svg.contains(&format!(r#"<title id="{id}-title">"#)) && svg.contains("<desc"), "{id}: title, desc");
        assert_eq!(svg.matches(mark).count(), *count, "{id}: marks");
        for t in tables {
            let tid = format!("table-{t}");
            let (tat, ttag) = element(dom, "table", &tid).unwrap_or_else(|| panic!("table {tid} missing"));
            assert!(tat > at, "{tid} comes after {id}");
            let (tw, th) = size(ttag);
            assert!(tw >= 100 && th >= 40, "{tid} rendered at {tw}x{th}");
            assert!(dom[tat..].find("<caption>").unwrap() < dom[tat..].find("</table>").unwrap(), "{tid} caption");
            cells += check_table(dom, &tid, json);
        }
    }
    assert_eq!(cells, dom.matches("<td data-path=").count(), "every number cell is in a checked table");
    for caution in ["Credit is correlational, not causal.", "This report is made from personal data."] {
        assert!(dom.contains(caution), "caution missing: {caution}");
    }
    // Self-contained: nothing to fetch.
    for fetch in ["<link", " src=", "href=\"http", "url(http", "@import"] {
        assert!(!dom.contains(fetch), "the page would fetch something: {fetch}");
    }
}

#[test]
fn report_renders_in_chromium_with_the_json_numbers() {
    let Some(browser) = chromium() else { return };
    let dir = tempfile::tempdir().unwrap();
    let demo = dir.path().join("demo");
    let demo_s = demo.to_str().unwrap();
    // The demo ends by writing its report and printing where.
    let out = apportion(&["demo", "--out-dir", demo_s, "--users", "1500"]);
    let line = out.lines().find(|l| l.starts_with("report:")).expect("demo prints the report's path");
    let demo_report = demo.join("report.html");
    assert!(line.contains(demo_report.to_str().unwrap()), "{line}");

    // The same comparison with lift tests, as HTML and JSON. The two
    // experiments are invented for this rendering check (their numbers are
    // not compared with any truth here; see apportion-report's tests).
    let experiments = dir.path().join("experiments.csv");
    std::fs::write(
        &experiments,
        "channel,start,end,incremental_conversions,std_error,low,high,source\n\
         email,2026-03-01,2026-05-31,90,15,,,invented for the rendering test\n\
         paid_search,2026-03-01,2026-05-31,160,,110,230,\"invented for the rendering test, as an interval\"\n",
    )
    .unwrap();
    let html = dir.path().join("compare.html");
    let json_file = dir.path().join("compare.json");
    for (format, file) in [("html", &html), ("json", &json_file)] {
        apportion(&[
            "compare",
            "--credits",
            demo_s,
            "--paths",
            demo_s,
            "--experiments",
            experiments.to_str().unwrap(),
            "--format",
            format,
            "--output",
            file.to_str().unwrap(),
        ]);
    }
    let json: Value = serde_json::from_str(&std::fs::read_to_string(&json_file).unwrap()).unwrap();
    let demo_json: Value =
        serde_json::from_str(&apportion(&["compare", "--credits", demo_s, "--paths", demo_s, "--format", "json"]))
            .unwrap();

    let artifacts = bin().parent().and_then(Path::parent).unwrap().join("test-artifacts");
    std::fs::create_dir_all(&artifacts).unwrap();
    let dom = render(&browser, &html, &artifacts.join("compare-report.png"));
    check_report(&dom, &json, true);
    // The whole page too, for whoever looks at the artefacts.
    let body = &dom[dom.find("<body").unwrap()..];
    let height: u32 = attr(&body[..body.find('>').unwrap()], "data-height").unwrap().parse().unwrap();
    assert!(height > 2400, "the report is longer than one screen: {height}");
    let full = artifacts.join("compare-report-full.png");
    headless(&browser, &[format!("--screenshot={}", full.display()), format!("--window-size=1280,{height}")], &html);
    assert_eq!(png_size(&std::fs::read(&full).unwrap()), (1280, height));
    let dom = render(&browser, &demo_report, &artifacts.join("demo-report.png"));
    check_report(&dom, &demo_json, false);
    eprintln!("screenshots: {}", artifacts.display());
}
