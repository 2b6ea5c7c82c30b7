//! The study's HTML page (`braid report`, written by `braid demo`): it is
//! self-contained, every number on it equals the number in its analysis's
//! JSON, and a real browser (headless Chromium) renders it with no console
//! errors, every figure drawn, every section heading shown and no request
//! leaving the file, as the browser's own network log records.

use std::path::{Path, PathBuf};
use std::process::Command;

use braid::report::html::HEADINGS;

use crate::common::{braid, run_ok, temp_dir};

/// The demo's folder, written once per test.
fn demo(name: &str) -> PathBuf {
    let dir = temp_dir(name).join("demo");
    run_ok(braid().args(["demo", "--quiet", "--out"]).arg(&dir));
    dir
}

/// Every `data-json` element of the page: file, pointer, attributes, text.
fn tagged(html: &str) -> Vec<(String, String, String, String)> {
    let mut out = Vec::new();
    let mut rest = html;
    while let Some(at) = rest.find("<span data-json=\"") {
        rest = &rest[at + 17..];
        let end = rest.find('>').unwrap();
        let attrs = &rest[..end];
        let file = attrs.split('"').next().unwrap().to_string();
        let ptr = attrs
            .split("data-ptr=\"")
            .nth(1)
            .unwrap()
            .split('"')
            .next()
            .unwrap()
            .to_string();
        let body = &rest[end + 1..];
        let text = body[..body.find("</span>").unwrap()].to_string();
        out.push((file, ptr, attrs.to_string(), text));
    }
    out
}

fn unescape(s: &str) -> String {
    s.replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&amp;", "&")
}

// Consistency: every number and verdict on the page is read back from the
// analysis's JSON document at the pointer the page names, and shown as the
// page says (to its stated decimals; p-values to three, or "< 0.001").
// Self-contained: no http(s) source or link, and under 3 MB.
#[test]
fn every_number_on_the_page_is_the_number_in_its_json() {
    let dir = demo("page-numbers");
    let html = std::fs::read_to_string(dir.join("report.html")).unwrap();
    assert!(html.len() < 3_000_000, "{} bytes", html.len());
    for attr in ["src=", "href="] {
        for (k, _) in html.match_indices(attr) {
            let value = html[k + attr.len()..].trim_start_matches(['"', '\'']);
            assert!(
                !value.starts_with("http:") && !value.starts_with("https:"),
                "an outside reference: {}",
                &html[k..(k + 60).min(html.len())]
            );
        }
    }
    let items = tagged(&html);
    assert!(items.len() > 150, "only {} tagged values", items.len());
    let mut documents = std::collections::BTreeMap::new();
    for (file, ptr, attrs, text) in &items {
        let doc = documents
            .entry(file.clone())
            .or_insert_with(|| crate::common::read_json(&dir.join(file)));
        let value = doc
            .pointer(ptr)
            .unwrap_or_else(|| panic!("{file}{ptr} is not in the JSON"));
        let text = unescape(text);
        if let Some(dp) = attrs.split("data-dp=\"").nth(1) {
            let dp: usize = dp.split('"').next().unwrap().parse().unwrap();
            let v = value
                .as_f64()
                .unwrap_or_else(|| panic!("{file}{ptr}: {value} is not a number"));
            assert_eq!(text, format!("{v:.dp$}"), "{file}{ptr}");
        } else if attrs.contains("data-p=") {
            let p = value.as_f64().unwrap();
            let shown = if p < 0.001 {
                "< 0.001".to_string()
            } else {
                format!("{p:.3}")
            };
            assert_eq!(text, shown, "{file}{ptr}");
        } else {
            assert_eq!(Some(text.as_str()), value.as_str(), "{file}{ptr}");
        }
    }
}

/// A Chromium found on PATH (or named by BRAID_BROWSER).
fn browser() -> Option<PathBuf> {
    if let Some(b) = std::env::var_os("BRAID_BROWSER") {
        return Some(PathBuf::from(b));
    }
    let path = std::env::var_os("PATH")?;
    ["chromium", "chromium-browser", "google-chrome", "chrome"]
        .iter()
        .flat_map(|name| std::env::split_paths(&path).map(move |d| d.join(name)))
        .find(|p| p.is_file())
}

/// The harness page: the report and a control page in frames; once both
/// have loaded, it writes what the browser laid out into a `pre`.
const HARNESS: &str = r#"<!DOCTYPE html><html><head><meta charset="utf-8"></head><body>
<iframe id="report" src="report.html" style="width:1280px;height:900px"></iframe>
<iframe id="control" src="control.html" style="width:200px;height:100px"></iframe>
<pre id="out">not measured</pre>
<script>
window.addEventListener("load", function () {
  try {
    var d = document.getElementById("report").contentDocument;
    var all = function (sel) { return Array.prototype.slice.call(d.querySelectorAll(sel)); };
    var sizes = all("figure svg").map(function (s) { var r = s.getBoundingClientRect(); return [r.width, r.height]; });
    var result = {
      figures: all("figure").length,
      sizes: sizes,
      headings: all("h2").map(function (h) { return h.textContent; }),
      titled: all("figure svg").filter(function (s) { return s.querySelector("title") && s.getAttribute("role") === "img"; }).length,
      header_cells: all("table th").length
    };
    document.getElementById("out").textContent = "MEASURED " + JSON.stringify(result);
  } catch (e) {
    document.getElementById("out").textContent = "FAILED " + e;
  }
});
</script></body></html>"#;

/// A page that fetches from outside: the network log must show its request,
/// so that finding none for the report means something.
const CONTROL: &str = r#"<!DOCTYPE html><html><head><meta charset="utf-8"></head><body>
<img src="http://braid-probe.invalid/probe.png" alt="probe"></body></html>"#;

/// The requests that pages (not the browser itself) sent to anywhere but a
/// file, from Chromium's network log.
fn page_requests(netlog: &Path) -> Vec<String> {
    let log = crate::common::read_json(netlog);
    let start = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
        .as_u64()
        .unwrap();
    log["events"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| e["type"].as_u64() == Some(start))
        .filter(|e| {
            e["params"]["network_isolation_key"]
                .as_str()
                .is_some_and(|k| k.contains("file://"))
        })
        .filter_map(|e| e["params"]["url"].as_str())
        .filter(|u| !u.starts_with("file:"))
        .map(String::from)
        .collect()
}

// The browser test. Without a browser it says plainly that it was skipped
// (`.ci/run` installs Chromium and sets BRAID_REQUIRE_BROWSER, so in CI it
// always runs).
#[test]
fn the_demo_page_renders_in_a_real_browser() {
    let Some(chromium) = browser() else {
        assert!(
            std::env::var_os("BRAID_REQUIRE_BROWSER").is_none(),
            "BRAID_REQUIRE_BROWSER is set but no Chromium was found on PATH"
        );
        println!("browser test SKIPPED: no Chromium on PATH (install the chromium package, or set BRAID_BROWSER)");
        return;
    };
    let dir = demo("page-browser");
    std::fs::write(dir.join("harness.html"), HARNESS).unwrap();
    std::fs::write(dir.join("control.html"), CONTROL).unwrap();
    let netlog = dir.join("netlog.json");
    let out = Command::new(&chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--allow-file-access-from-files",
            "--enable-logging=stderr",
            "--v=0",
            "--virtual-time-budget=10000",
        ])
        .arg(format!("--user-data-dir={}", dir.join("profile").display()))
        .arg(format!("--log-net-log={}", netlog.display()))
        .arg("--dump-dom")
        .arg(format!("file://{}", dir.join("harness.html").display()))
        .output()
        .unwrap();
    let dom = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    // Console messages of the report page (it has no script, so any is an error).
    let console: Vec<&str> = stderr
        .lines()
        .filter(|l| l.contains(":CONSOLE") && l.contains("report.html"))
        .collect();
    assert!(console.is_empty(), "console messages: {console:?}");
    let measured = dom
        .split("MEASURED ")
        .nth(1)
        .and_then(|r| r.split("</pre>").next())
        .unwrap_or_else(|| panic!("the harness did not measure the page: {dom}\n{stderr}"));
    let m: serde_json::Value = serde_json::from_str(&measured.replace("&quot;", "\"")).unwrap();
    let sizes = m["sizes"].as_array().unwrap();
    assert!(m["figures"].as_u64().unwrap() >= 6, "{m}");
    assert_eq!(
        sizes.len() as u64,
        m["figures"].as_u64().unwrap(),
        "a figure without its SVG"
    );
    for s in sizes {
        assert!(
            s[0].as_f64().unwrap() > 100.0 && s[1].as_f64().unwrap() > 50.0,
            "a figure drawn at {s}"
        );
    }
    assert_eq!(m["titled"], m["figures"], "every figure has a text alternative");
    assert!(m["header_cells"].as_u64().unwrap() > 20);
    let headings: Vec<&str> = m["headings"]
        .as_array()
        .unwrap()
        .iter()
        .filter_map(|h| h.as_str())
        .collect();
    for h in HEADINGS.iter().filter(|h| **h != "Reliability of the scale") {
        assert!(headings.contains(h), "heading {h} missing: {headings:?}");
    }
    let requests = page_requests(&netlog);
    assert_eq!(
        requests,
        ["http://braid-probe.invalid/probe.png"],
        "the report (or the measure) is wrong: {requests:?}"
    );
}

// `braid report --study` on the demo's study file runs the same analyses as
// the demo (its [report] table asks for the ANOVA): the same JSON documents,
// and a page that says the same numbers. Without --out it says what to do.
#[test]
fn the_report_command_reproduces_the_demo_from_its_study_file() {
    let dir = demo("page-report");
    let out = dir.parent().unwrap().join("again");
    run_ok(
        braid()
            .args(["report", "--quiet", "--study"])
            .arg(dir.join("study.toml"))
            .arg("--out")
            .arg(&out),
    );
    for file in ["design.json", "converge.json", "apc.json", "anova.json"] {
        assert_eq!(
            std::fs::read(dir.join(file)).unwrap(),
            std::fs::read(out.join(file)).unwrap(),
            "{file} differs"
        );
    }
    // The demo's fit also asks for the mean at three ages; the rest agrees.
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(tagged(&html).len() > 150);
    assert!(
        html.contains("<code>braid report --quiet --study"),
        "the command is recorded"
    );
    assert!(html.contains(&braid::study::sha256_file(&dir.join("panel.csv")).unwrap()));
    let missing = braid()
        .args(["report", "--quiet", "--study"])
        .arg(dir.join("study.toml"))
        .output()
        .unwrap();
    crate::common::expect_one_line_error(&missing, "--out: is required", "report without --out");
}

// The manual page comes from the same clap definitions as --help.
#[test]
fn the_manual_page_is_roff_of_every_command() {
    let out = run_ok(braid().arg("manual"));
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.starts_with(".ie") || text.contains(".TH braid"),
        "{}",
        &text[..200.min(text.len())]
    );
    for command in ["fit", "converge", "report", "plan"] {
        assert!(text.contains(command), "{command} missing from the manual");
    }
}

// A study the convergence and APC analyses cannot run on (one derived
// cohort, no calendar time; the dental data of Potthoff & Roy 1964) still
// gets its page: those sections say why they were not run, and the counts
// say what was derived.
#[test]
fn a_study_without_cohorts_or_calendar_gets_a_page_with_reasons() {
    let out = temp_dir("page-dental").join("report");
    run_ok(
        braid()
            .arg("report")
            .arg(crate::common::data_dir().join("dental.csv"))
            .args(crate::common::DENTAL_ROLES)
            .args(["--quiet", "--out"])
            .arg(&out),
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_eq!(
        html.matches("class=\"skipped\">Not run:").count(),
        2,
        "two sections skipped with a reason"
    );
    assert!(html.contains("1 cohort (derived)"));
    assert!(html.contains("none named"));
    assert!(!out.join("converge.json").exists() && !out.join("apc.json").exists());
    assert!(tagged(&html).len() > 40);
}
