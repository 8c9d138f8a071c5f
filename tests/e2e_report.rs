//! End-to-end: `tidemark drift` and `tidemark report` on a small generated network delivered in
//! three parts, through the real binary; the report is also rendered in headless
//! Chromium and the screenshot checked for content.

mod common;

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use common::Network;
use tidemark_model::simulate::{simulate_rows, NetworkSpec};

const CONFIG: &str = r#"
[store]
database = "tidemark.db"

[feed]
inbox = "inbox"
archive = "archive"
quarantine = "quarantine"

[[series]]
name = "phosphorus"
response = "tp_ug_l"
site = "lake"
year = "season"
visit = "visit"
thresholds = [19.5, 21.0]

[series.sampler]
chains = 4
draws = 500
warmup = 300
seed = 5
max_rhat = 1.05
min_ess = 200
"#;

/// Site codes that must reach the page verbatim and harmless.
const SQL_CODE: &str = "S6';DROP TABLE fits;--";
const MARKUP_CODE: &str = "Lake <b>&\"7";

fn csv_field(text: &str) -> String {
    format!("\"{}\"", text.replace('"', "\"\""))
}

/// Invented test data: `spec`'s network as feed CSV for the given years; site codes are
/// `{prefix} NN`, except sites 6 and 7 of the base network, which get the awkward codes.
fn feed(spec: &NetworkSpec, prefix: &str, years: std::ops::Range<i32>) -> String {
    let (rows, _) = simulate_rows(spec);
    let mut out = String::from("lake,season,visit,tp_ug_l\n");
    let mut visit = std::collections::HashMap::new();
    for r in rows.iter().filter(|r| years.contains(&r.year)) {
        let v = visit.entry((r.site, r.year)).or_insert(0);
        *v += 1;
        let code = match (prefix, r.site) {
            ("Lake", 6) => SQL_CODE.to_string(),
            ("Lake", 7) => MARKUP_CODE.to_string(),
            _ => format!("{prefix} {:02}", r.site),
        };
        out.push_str(&format!(
            "{},{},{},{:.4}\n",
            csv_field(&code),
            r.year,
            v,
            r.y
        ));
    }
    out
}

fn base() -> NetworkSpec {
    NetworkSpec {
        sites: 15,
        years: 8,
        visits: 2,
        missing: 0.1,
        covariates: 0,
        sd_residual: 0.3,
        sd_site: 0.4,
        sd_year: 0.3,
        intercept: 20.0,
        coef: 0.0,
        first_year: 2015,
        seed: 31,
    }
}

/// Three published versions: 2015–2020 of the base network; one more year of the same
/// network (the partition holds); then 30 new lakes whose site-to-site spread is ten
/// times larger (the partition moves: sd site must jump).
fn three_deliveries() -> Network {
    let net = Network::with_config(CONFIG);
    net.ok(&["init"]);
    net.drop_file("a-2015-2020.csv", feed(&base(), "Lake", 2015..2021));
    net.ok(&["run-once"]);
    net.drop_file("b-2021.csv", feed(&base(), "Lake", 2021..2022));
    net.ok(&["run-once"]);
    let far = NetworkSpec {
        sites: 30,
        sd_site: 4.0,
        seed: 77,
        ..base()
    };
    net.drop_file("c-far-lakes.csv", feed(&far, "Far", 2015..2022));
    net.ok(&["run-once"]);
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM fits WHERE status = 'published'")
            .int(),
        3
    );
    net
}

fn f(v: &serde_json::Value) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("expected a number, found {v}"))
}

#[test]
fn drift_flags_a_partition_that_moves_and_not_one_that_holds() {
    let net = three_deliveries();
    let doc: serde_json::Value =
        serde_json::from_str(&net.ok(&["drift", "--json"])).expect("one JSON document");
    assert!(doc["rule"].as_str().unwrap().contains("screening rule"));
    let series = doc["series"].as_array().unwrap();
    assert_eq!(series.len(), 1);
    assert_eq!(series[0]["series"], "phosphorus");
    let versions = series[0]["versions"].as_array().unwrap();
    assert_eq!(versions.len(), 3);
    let years: Vec<i64> = versions
        .iter()
        .map(|v| v["data_through_year"].as_i64().unwrap())
        .collect();
    assert_eq!(years, [2020, 2021, 2021]);

    let component = |v: usize, kind: &str, term: &str| -> serde_json::Value {
        versions[v]["components"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["kind"] == kind && c["term"] == term)
            .unwrap_or_else(|| panic!("version {} has no {kind} {term}", v + 1))
            .clone()
    };
    let mut flagged = 0;
    for (i, v) in versions.iter().enumerate() {
        let components = v["components"].as_array().unwrap();
        let kinds: Vec<(&str, &str)> = components
            .iter()
            .map(|c| (c["kind"].as_str().unwrap(), c["term"].as_str().unwrap()))
            .collect();
        for term in ["site", "year", "residual"] {
            assert!(kinds.contains(&("sd", term)) && kinds.contains(&("share", term)));
        }
        for c in components {
            let (q05, q50, q95) = (f(&c["q05"]), f(&c["q50"]), f(&c["q95"]));
            // The numbers are the stored posterior summaries.
            let stored = net.sql(&format!(
                "SELECT q05, q50, q95 FROM posterior_summary WHERE fit_id = {} AND kind = '{}' AND term = '{}'",
                v["fit_id"], c["kind"].as_str().unwrap(), c["term"].as_str().unwrap()
            ));
            // (Parsing JSON without serde_json's float_roundtrip may move the last bit.)
            let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1.0);
            for (db, printed) in [
                (&stored[0][0], q05),
                (&stored[0][1], q50),
                (&stored[0][2], q95),
            ] {
                assert!(close(db.real(), printed), "{db} vs {printed}");
            }
            if i == 0 {
                assert!(c["previous_q50"].is_null() && c["change"].is_null());
                assert_eq!(c["flag"], false);
                continue;
            }
            let kind = c["kind"].as_str().unwrap();
            let term = c["term"].as_str().unwrap();
            let previous = f(&component(i - 1, kind, term)["q50"]);
            assert!(close(f(&c["previous_q50"]), previous));
            assert!((f(&c["change"]) - (q50 - previous)).abs() < 1e-12);
            // The documented rule, recomputed from the printed numbers.
            assert_eq!(
                c["flag"].as_bool().unwrap(),
                previous < q05 || previous > q95,
                "{c}"
            );
            flagged += usize::from(c["flag"].as_bool().unwrap());
        }
    }
    assert_eq!(series[0]["flagged"].as_u64().unwrap() as usize, flagged);

    // One more year of the same network: nothing moves beyond its own uncertainty.
    for c in versions[1]["components"].as_array().unwrap() {
        assert_eq!(c["flag"], false, "version 2 must not be flagged: {c}");
    }
    // Thirty lakes with a tenfold site spread: the site sd and its share jump.
    let site = component(2, "sd", "site");
    assert_eq!(site["flag"], true, "{site}");
    assert!(f(&site["change"]) > 0.5, "{site}");
    assert_eq!(component(2, "share", "site")["flag"], true);

    // The text form: the rule, one block per quantity, the flag on version 3 of sd site.
    let text = net.ok(&["drift"]);
    assert!(
        text.contains("screening rule, not a statistical test"),
        "{text}"
    );
    assert!(
        text.contains("series phosphorus: 3 published version(s)"),
        "{text}"
    );
    let block: Vec<&str> = text
        .lines()
        .skip_while(|l| !l.trim().starts_with("sd site ("))
        .skip(2)
        .take(3)
        .collect();
    assert_eq!(block.len(), 3, "{text}");
    assert!(block[0].trim_start().starts_with("1    2020") && block[0].trim_end().ends_with('-'));
    assert!(!block[1].trim_end().ends_with('*'), "{}", block[1]);
    assert!(block[2].trim_end().ends_with('*'), "{}", block[2]);
    let help = net.ok(&["drift", "--help"]);
    assert!(
        help.contains("excludes the previous version's median")
            && help.contains("screening rule, not a statistical test"),
        "{help}"
    );
    // `--series` selects; an unknown name is refused with the names there are.
    assert_eq!(
        net.ok(&["drift", "--series", "phosphorus", "--json"]),
        net.ok(&["drift", "--json"])
    );
    let unknown = net.tidemark(&["drift", "--series", "nitrogen"]);
    assert!(!unknown.status.success());
    let stderr = String::from_utf8_lossy(&unknown.stderr);
    assert!(stderr.contains("no series named \"nitrogen\"") && stderr.contains("phosphorus"));
}

/// Charts on the page of [`three_deliveries`]: three per series plus 12 site panels.
const CHARTS: usize = 3 + 12;

/// The first run of more than seven digits after a decimal point in the page's text
/// (chart labels included), if any.
fn regex_free_long_number(html: &str) -> Option<String> {
    let b = html.as_bytes();
    let mut i = 0;
    while i < b.len() {
        if b[i] == b'.' && i > 0 && b[i - 1].is_ascii_digit() {
            let digits = b[i + 1..].iter().take_while(|c| c.is_ascii_digit()).count();
            // Attribute values (coordinates, font sizes) are not labels.
            let in_tag = html[..i].rfind('<') > html[..i].rfind('>');
            if digits > 7 && !in_tag {
                return Some(html[i.saturating_sub(10)..i + 1 + digits].to_string());
            }
            i += digits;
        }
        i += 1;
    }
    None
}

fn write_report(net: &Network) -> (std::path::PathBuf, String) {
    let out = net.path("reports/latest.html");
    std::fs::create_dir_all(out.parent().unwrap()).unwrap();
    let stdout = net.ok(&["report", "--out", out.to_str().unwrap()]);
    assert!(stdout.contains("wrote"), "{stdout}");
    let html = std::fs::read_to_string(&out).expect("report written");
    (out, html)
}

#[test]
fn the_report_is_one_self_contained_page_with_escaped_codes() {
    let net = three_deliveries();
    let (out, html) = write_report(&net);
    assert_eq!(html.matches("<html").count(), 1);
    assert!(html.starts_with("<!DOCTYPE html>"));
    assert!(html.trim_end().ends_with("</html>"));
    // One series: variance components, interval widths, site effects, and a small chart
    // for each of the 12 most extreme of its 45 sites.
    assert_eq!(html.matches("<svg").count(), CHARTS, "every chart");
    assert_eq!(html.matches("</svg>").count(), CHARTS);
    assert!(html.contains("the 12 sites with the largest site effects"));
    // Axes say their scale; tick labels are short numbers, never 15-digit floats.
    for axis in [
        "sd (model scale = response scale, tp_ug_l units; log axis)",
        "width of the 80% interval (response scale, tp_ug_l units)",
        "site effect (response scale, tp_ug_l units; 0 = network mean)",
        "tp_ug_l units",
    ] {
        assert!(html.contains(axis), "axis description {axis:?} missing");
    }
    let long_number = regex_free_long_number(&html);
    assert!(long_number.is_none(), "a long tick label: {long_number:?}");
    // Nothing is loaded from anywhere: no URL, no script, no linked resource.
    for needle in [
        "http:", "https:", "<script", "<link", "<img", "<iframe", "src=", "url(", "@import",
    ] {
        assert!(!html.contains(needle), "the page contains {needle:?}");
    }
    // Next year's exceedance probabilities: the 20 of 45 lakes most likely to exceed the
    // lower threshold, one column per threshold, with the caution beside the table.
    assert!(
        html.contains("the 20 of 45 monitored sites most likely to exceed 19.5 tp_ug_l units"),
        "exceedance table heading missing"
    );
    assert!(html.contains("<th>P(&gt; 19.5)</th><th>P(&gt; 21)</th>"));
    let table = &html[html
        .find("Probability of exceeding the thresholds")
        .unwrap()..];
    let table = &table[..table.find("</section>").unwrap()];
    assert_eq!(table.matches("<tr><td>").count(), 20);
    assert!(table.contains("qualified staff") && table.contains("notification rules"));
    // The cautions, in substance.
    for phrase in [
        "statistical estimates",
        "drinking-water",
        "algal blooms",
        "sampling, testing and notification rules",
        "qualified staff",
    ] {
        assert!(html.contains(phrase), "caution phrase {phrase:?} missing");
    }
    // Awkward site codes appear escaped (in the chart labels at least), never raw.
    assert!(!html.contains(MARKUP_CODE), "raw markup from a site code");
    assert!(!html.contains("<b>&"));
    assert!(!html.contains(SQL_CODE), "raw quote from a site code");
    let markup_escaped = ["Lake &lt;b&gt;&amp;&quot;7", "Lake &lt;b&gt;&amp;&#x22;7"];
    assert!(
        markup_escaped.iter().any(|e| html.contains(e)),
        "escaped markup code missing"
    );
    assert!(
        html.contains("S6&apos;;DROP TABLE fits;--")
            || html.contains("S6&#x27;;DROP TABLE fits;--"),
        "escaped SQL-looking code missing"
    );
    // The run history lists every run with its per-series outcome.
    assert_eq!(
        html.matches("phosphorus: <span class=\"published\">published</span>")
            .count(),
        3
    );
    // The database is intact, and the file was replaced atomically (no temporary left).
    assert_eq!(net.scalar("SELECT COUNT(*) FROM fits").int(), 3);
    let (_, again) = write_report(&net);
    assert_eq!(again.matches("<svg").count(), CHARTS);
    let leftovers: Vec<_> = std::fs::read_dir(out.parent().unwrap())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(leftovers, ["latest.html"]);
    // An unknown series is refused; a folder that does not exist is a clear error.
    assert!(!net
        .tidemark(&["report", "--out", "x.html", "--series", "nitrogen"])
        .status
        .success());
    let missing = net.tidemark(&["report", "--out", "no/such/folder/r.html"]);
    assert!(!missing.status.success());
    assert!(String::from_utf8_lossy(&missing.stderr).contains("cannot write the report"));
}

/// Where Debian's chromium is, or a failure that says how to get it (CI installs it).
fn chromium() -> String {
    for name in ["chromium", "chromium-browser"] {
        let found = Command::new("sh")
            .arg("-c")
            .arg(format!("command -v {name}"))
            .output()
            .map(|o| o.status.success())
            .unwrap_or(false);
        if found {
            return name.to_string();
        }
    }
    panic!(
        "headless Chromium is needed to check the report's rendering and was not found on PATH; \
         install it with `apt-get install chromium` (.ci/run does this on CI)"
    );
}

/// Run headless Chromium on `html` at `width` x 2000 with `mode` (`--screenshot=…` or
/// `--dump-dom`), in a fresh profile; returns its stdout.
fn chromium_at(html: &Path, width: u32, extra: &str, mode: &str) -> String {
    let profile = tempfile::tempdir().unwrap();
    let out = tempfile::NamedTempFile::new().unwrap();
    let mut child = Command::new(chromium())
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
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg(extra)
        .arg(mode)
        .arg(format!("--window-size={width},2000"))
        .arg(format!("file://{}", html.display()))
        .stdout(out.reopen().unwrap())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("start chromium");
    let start = Instant::now();
    loop {
        if let Some(status) = child.try_wait().unwrap() {
            assert!(status.success(), "chromium exited with {status}");
            break;
        }
        if start.elapsed() > Duration::from_secs(120) {
            let _ = child.kill();
            panic!("chromium did not finish within 120 s");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    std::fs::read_to_string(out.path()).unwrap()
}

fn screenshot(html: &Path, png: &Path, width: u32) {
    chromium_at(
        html,
        width,
        "--disable-extensions",
        &format!("--screenshot={}", png.display()),
    );
}

/// Layout facts of the page in a viewport `width` px wide, measured by a harness page
/// that only this test writes (the product page has no JavaScript): the page is loaded
/// unchanged into an iframe of that width (headless Chromium's window cannot be narrower
/// than 500 px, an iframe can), and a script reads its document's scroll width, its
/// viewport width, the number of SVG charts, the right edge of the widest one and each
/// chart's title (its first text).
fn measure(html: &Path, width: u32) -> (f64, f64, usize, f64, Vec<String>) {
    let harness = html.with_file_name(format!("harness-{width}.html"));
    let page = html.file_name().unwrap().to_string_lossy();
    std::fs::write(
        &harness,
        format!(
            r#"<!DOCTYPE html><html><body style="margin:0">
<iframe id="f" src="{page}" style="width:{width}px;height:1500px;border:0"></iframe>
<script>
document.getElementById('f').addEventListener('load', function () {{
  var doc = this.contentDocument, win = this.contentWindow;
  var svgs = Array.from(doc.querySelectorAll('svg'));
  var right = Math.max.apply(null, svgs.map(function (s) {{ return s.getBoundingClientRect().right; }}));
  var titles = svgs.map(function (s) {{ var t = s.querySelector('text'); return t ? t.textContent.trim() : ''; }});
  var o = document.createElement('pre');
  o.id = 'measure';
  o.textContent = 'MEASURE ' + doc.documentElement.scrollWidth + ' ' + win.innerWidth + ' ' +
    svgs.length + ' ' + right + ' ' + titles.join('|');
  document.body.appendChild(o);
}});
</script></body></html>"#
        ),
    )
    .unwrap();
    let dom = chromium_at(
        &harness,
        1280,
        "--allow-file-access-from-files",
        "--dump-dom",
    );
    let line = dom
        .lines()
        .find_map(|l| l.split("<pre id=\"measure\">MEASURE ").nth(1))
        .unwrap_or_else(|| panic!("no measurement in the DOM at width {width}:\n{dom}"));
    let line = line.split("</pre>").next().unwrap();
    let mut parts = line.splitn(5, ' ');
    let mut num = || -> f64 { parts.next().unwrap().parse().unwrap() };
    let (scroll, viewport, svgs, right) = (num(), num(), num(), num());
    let titles = parts
        .next()
        .unwrap_or("")
        .split('|')
        .map(|t| {
            t.replace("&amp;", "&")
                .replace("&lt;", "<")
                .replace("&gt;", ">")
        })
        .collect();
    (scroll, viewport, svgs as usize, right, titles)
}

fn check_png(png_path: &Path, width: u32) {
    let decoder = png::Decoder::new(std::fs::File::open(png_path).expect("screenshot written"));
    let mut reader = decoder.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    assert_eq!((info.width, info.height), (width, 2000));
    let channels = info.color_type.samples();
    assert!(
        channels >= 3,
        "unexpected colour type {:?}",
        info.color_type
    );
    let pixels: Vec<[u8; 3]> = buf[..info.buffer_size()]
        .chunks(channels)
        .map(|p| [p[0], p[1], p[2]])
        .collect();
    let non_white = pixels.iter().filter(|p| p.iter().any(|&c| c < 235)).count();
    let share = non_white as f64 / pixels.len() as f64;
    assert!(
        share > 0.03,
        "{width}: the screenshot is nearly blank: {share:.4} non-white"
    );
    let distinct: std::collections::HashSet<[u8; 3]> = pixels.iter().copied().collect();
    assert!(
        distinct.len() > 50,
        "{width}: only {} distinct colours",
        distinct.len()
    );
    // The charts were drawn: the palette's blue and vermillion are on screen.
    let near = |c: [u8; 3]| {
        pixels.iter().any(|p| {
            p.iter()
                .zip(c)
                .all(|(&a, b)| (i32::from(a) - i32::from(b)).abs() <= 12)
        })
    };
    assert!(
        near([0, 114, 178]),
        "{width}: no chart blue in the screenshot"
    );
    assert!(
        near([213, 94, 0]),
        "{width}: no chart vermillion in the screenshot"
    );
}

#[test]
fn the_report_renders_in_headless_chromium() {
    let net = three_deliveries();
    // Two runs with nothing new: they tell the same thing and share one history line.
    net.ok(&["run-once"]);
    net.ok(&["run-once"]);
    let (out, html) = write_report(&net);
    assert!(
        html.contains("×2<"),
        "two identical runs collapse into one line"
    );
    assert_eq!(
        html.matches("<td class=\"num count\">").count(),
        4,
        "3 + 1 history lines"
    );
    // To look at the page and the screenshots yourself: TIDEMARK_KEEP_REPORT=DIR.
    let keep = std::env::var_os("TIDEMARK_KEEP_REPORT").map(std::path::PathBuf::from);
    // Screenshots at a desktop width and at the narrowest window headless Chromium has.
    for width in [1280, 500] {
        let png_path = net.path(&format!("reports/latest-{width}.png"));
        screenshot(&out, &png_path, width);
        if let Some(keep) = &keep {
            std::fs::create_dir_all(keep).unwrap();
            std::fs::copy(&png_path, keep.join(format!("report-{width}.png"))).unwrap();
        }
        check_png(&png_path, width);
    }
    // Layout at a desktop width and at a phone's.
    for width in [1280, 420] {
        let (scroll, viewport, svgs, right, titles) = measure(&out, width);
        assert_eq!(viewport, f64::from(width), "the viewport is the window");
        assert!(
            scroll <= viewport,
            "{width}: the page scrolls sideways ({scroll} > {viewport})"
        );
        assert!(right <= viewport + 0.5, "{width}: a chart ends at {right}");
        assert_eq!(svgs, CHARTS, "{width}: every chart is in the DOM");
        for title in [
            "Standard deviations by published version",
            "Width of the 80% forecast interval",
            "Site effects, latest version",
        ] {
            assert!(
                titles.iter().any(|t| t.starts_with(title)),
                "{width}: no chart titled {title:?} in {titles:?}"
            );
        }
    }
    if let Some(keep) = &keep {
        for (from, name) in [(&out, "report.html"), (&net.db_path(), "tidemark.db")] {
            std::fs::copy(from, keep.join(name)).unwrap();
        }
        std::fs::write(keep.join("tidemark.toml"), CONFIG).unwrap();
    }
}

#[test]
fn named_report_sites_get_their_own_charts() {
    let net = three_deliveries();
    let config = CONFIG.replace(
        "visit = \"visit\"\n",
        &format!(
            "visit = \"visit\"\nunit = \"µg/L\"\nreport_sites = [\"Lake 01\", {:?}, \"Nowhere <x>\"]\n",
            MARKUP_CODE
        ),
    );
    std::fs::write(net.config_path(), config).unwrap();
    let (_, html) = write_report(&net);
    assert!(html.contains("the sites named in <code>report_sites</code>"));
    // The versions predate the unit: the axes take the config's.
    assert!(html.contains("width of the 80% interval (response scale, µg/L)"));
    // (Text in the page is escaped with `/` as `&#x2F;`.)
    assert!(html.contains("(transform none, unit µg&#x2F;L)"));
    assert_eq!(
        html.matches("<svg").count(),
        3 + 2,
        "two named sites have data"
    );
    assert!(html.contains("No stored value or forecast") && html.contains("Nowhere &lt;x&gt;"));
    assert!(!html.contains(MARKUP_CODE));
    // Each panel has next year's band: the known-site forecast exists for both sites.
    assert!(!html.contains("no next-year forecast"));
    let next = net.scalar(
        "SELECT COUNT(*) FROM latest_forecasts WHERE target = 'known_site_new_year' \
         AND site IN ('Lake 01', 'Lake <b>&\"7') AND year = 2022",
    );
    assert_eq!(next.int(), 2);
}

/// A control character anywhere outside a line end, or in the page.
fn has_control(text: &str) -> bool {
    text.chars().any(|c| c.is_control() && c != '\n')
}

/// A file name and a site code holding terminal escape sequences (clear the screen, set
/// the window title, ring the bell) are stored verbatim, but `ingest`, `run-once`, `status`
/// and the report (HTML and its SVG) show them only as visible escapes.
#[test]
fn control_characters_in_names_and_codes_are_shown_as_escapes() {
    let net = Network::with_config(CONFIG);
    net.ok(&["init"]);
    let code = "Lake\u{1b}[2J\u{1b}]0;owned\u{7} 03";
    let shown_code = "Lake\\u{1b}[2J\\u{1b}]0;owned\\u{7} 03";
    let name = "spring\u{1b}[2J\u{1b}[31m\n.csv";
    let shown_name = "spring\\u{1b}[2J\\u{1b}[31m\\n.csv";
    let text = feed(&base(), "Lake", 2015..2021).replace("\"Lake 03\"", &csv_field(code));
    assert!(text.contains(code));
    net.drop_file(name, text);

    let out = net.tidemark(&["ingest"]);
    let (stdout, stderr) = (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    );
    assert!(out.status.success(), "{stdout}{stderr}");
    assert!(
        !has_control(&stdout) && !has_control(&stderr),
        "{stdout:?} {stderr:?}"
    );
    assert!(
        stdout.starts_with(&format!("inbox/{shown_name}: ingested as batch 1"))
            || stdout.contains(&format!("/{shown_name}: ingested as batch 1")),
        "{stdout}"
    );
    // The data itself is kept verbatim.
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM sites WHERE code = 'Lake' || char(27) || '[2J' || char(27) || ']0;owned' || char(7) || ' 03'").int(),
        1
    );
    assert_eq!(net.scalar("SELECT source FROM ingest_batches").text(), name);

    let run = net.tidemark(&["run-once"]);
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    assert!(!has_control(&String::from_utf8_lossy(&run.stdout)));
    assert!(!has_control(&String::from_utf8_lossy(&run.stderr)));

    let status = net.ok(&["status"]);
    assert!(!has_control(&status), "{status:?}");
    assert!(status.contains(shown_name), "{status}");

    let missing = net.tidemark(&["ingest", "no\u{1b}[2Jsuch.csv"]);
    let stderr = String::from_utf8_lossy(&missing.stderr);
    assert!(!missing.status.success());
    assert!(!has_control(&stderr), "{stderr:?}");
    assert!(
        stderr.contains("no\\u{1b}[2Jsuch.csv is not a file"),
        "{stderr}"
    );

    let (_, html) = write_report(&net);
    assert!(!has_control(&html), "a control character in the report");
    // Drawn in the site-effect chart and, as one of the extreme sites or not, listed there.
    assert!(
        html.contains(shown_code),
        "the code shown with visible escapes"
    );
}
