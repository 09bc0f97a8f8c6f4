//! card.html in a real browser: headless Chromium loads the card, takes a
//! screenshot, prints it to PDF, and a harness copy of the page reports the
//! rendered size of every figure and whether the page fits a phone's width.
//! The page itself must log nothing to the console and fetch nothing from
//! the network (checked in Chromium's own network log).
//!
//! Without a Chromium the test prints a skip; when `CI` is set it fails
//! instead, because `.ci/run` installs one.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::util::*;

fn chromium() -> Option<PathBuf> {
    if let Some(p) = std::env::var_os("ANOMARK_CHROMIUM") {
        return Some(PathBuf::from(p));
    }
    let path = std::env::var_os("PATH")?;
    for dir in std::env::split_paths(&path) {
        for name in ["chromium", "chromium-browser", "google-chrome"] {
            let p = dir.join(name);
            if p.is_file() {
                return Some(p);
            }
        }
    }
    None
}

/// Runs Chromium headless on `page` with `extra` flags; returns its stderr.
fn browse(bin: &Path, work: &Path, page: &Path, extra: &[String]) -> (String, String) {
    let profile = tempfile::tempdir_in(work).unwrap();
    let mut cmd = Command::new(bin);
    // The flags that keep a headless Chromium off the network it would
    // otherwise call for its own services (common practice, no source).
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-extensions",
        "--hide-scrollbars",
    ])
    .arg(format!("--user-data-dir={}", profile.path().display()))
    .args(extra)
    .arg(format!("file://{}", page.display()));
    // Files, not pipes: a DOM dump is larger than a pipe's buffer.
    let stdout = tempfile::NamedTempFile::new_in(work).unwrap();
    let stderr = tempfile::NamedTempFile::new_in(work).unwrap();
    cmd.stdin(Stdio::null())
        .stdout(stdout.reopen().unwrap())
        .stderr(stderr.reopen().unwrap());
    let mut child = cmd.spawn().expect("start chromium");
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            panic!("chromium did not finish within 120 s");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let read = |f: &tempfile::NamedTempFile| {
        String::from_utf8_lossy(&std::fs::read(f.path()).unwrap()).into_owned()
    };
    (read(&stdout), read(&stderr))
}

/// Appended to a copy of the card (never to the card itself, which has no
/// script): writes each figure's rendered size and the page's overflow into
/// the DOM, which `--dump-dom` then prints.
const HARNESS: &str = r#"<script>
(function () {
  var out = [];
  document.querySelectorAll("figure.plot").forEach(function (f) {
    var s = f.querySelector("svg"), r = s ? s.getBoundingClientRect() : {width: 0, height: 0};
    out.push(f.getAttribute("data-plot") + " " + Math.round(r.width) + "x" + Math.round(r.height) + " " + (s ? s.querySelectorAll("*").length : 0));
  });
  // Every details section open, so that its tables are measured too; then
  // each table's width against the box it sits in (a wider table scrolls).
  document.querySelectorAll("details").forEach(function (d) { d.open = true; });
  document.querySelectorAll("table").forEach(function (t, i) {
    var box = t.parentElement;
    out.push("table " + i + " " + (t.scrollWidth - box.clientWidth));
  });
  var a = document.querySelector("figure.intervals svg"), ar = a ? a.getBoundingClientRect() : {width: 0, height: 0};
  out.push("answer " + Math.round(ar.width) + "x" + Math.round(ar.height));
  out.push("overflow " + (document.documentElement.scrollWidth - window.innerWidth));
  var pre = document.createElement("pre");
  pre.id = "harness";
  pre.textContent = out.join("\n");
  document.body.appendChild(pre);
})();
</script>"#;

/// The probe page in a frame of `WIDTH` px; copies the frame's report out.
const FRAMED: &str = r#"<!DOCTYPE html><html><body style="margin:0">
<iframe id="f" src="probe.html" style="width:WIDTHpx;height:3000px;border:0"></iframe>
<script>
window.addEventListener("load", function () {
  var d = document.getElementById("f").contentDocument, p = document.createElement("pre");
  p.id = "harness";
  p.textContent = d && d.getElementById("harness") ? d.getElementById("harness").textContent : "";
  document.body.appendChild(p);
});
</script></body></html>"#;

fn harness_report(dom: &str) -> Option<Vec<String>> {
    let start = dom.find("<pre id=\"harness\">")? + 18;
    let end = start + dom[start..].find("</pre>")?;
    Some(dom[start..end].lines().map(str::to_string).collect())
}

#[test]
fn card_renders_in_headless_chromium() {
    let Some(bin) = chromium() else {
        if std::env::var_os("CI").is_some() {
            panic!("CI is set but no Chromium was found: .ci/run installs Debian's chromium");
        }
        eprintln!("skipped: no Chromium on PATH (set ANOMARK_CHROMIUM or install chromium)");
        return;
    };
    let d = standard(&rows(400, 20, 31)).run_spec().success();
    let out = d.dir.join("out");
    let card = out.join("card.html");
    let html = d.read("out/card.html");
    let figures = html.matches("<figure class=\"plot\"").count();
    assert_eq!(figures, 10, "validation, test and feature figures");

    // 1. The page as written: screenshot, console, network.
    let shot = d.dir.join("card.png");
    let net = d.dir.join("net.json");
    let (_, stderr) = browse(
        &bin,
        &d.dir,
        &card,
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1000,4000".into(),
            format!("--log-net-log={}", net.display()),
            "--enable-logging=stderr".into(),
            "--v=0".into(),
        ],
    );
    let png = std::fs::read(&shot).unwrap_or_else(|_| panic!("no screenshot; stderr: {stderr}"));
    // The PNG signature (RFC 2083, section 3.1).
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n");
    assert!(png.len() > 20_000, "screenshot is suspiciously small");
    let console: Vec<&str> = stderr.lines().filter(|l| l.contains(":CONSOLE")).collect();
    assert!(
        console.is_empty(),
        "the card logged to the console: {console:?}"
    );
    // Requests made on behalf of the page carry its file:// isolation key;
    // the browser's own service calls do not.
    let log: serde_json::Value = serde_json::from_slice(&std::fs::read(&net).expect("network log"))
        .expect("network log JSON");
    let fetched: Vec<String> = log["events"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|e| {
            e["params"]["network_isolation_key"]
                .as_str()
                .is_some_and(|k| k.starts_with("file://"))
        })
        .filter_map(|e| e["params"]["url"].as_str().map(str::to_string))
        .filter(|u| !u.starts_with("file:") && !u.starts_with("data:"))
        .collect();
    assert!(fetched.is_empty(), "the card fetched {fetched:?}");

    // 2. Every figure is laid out with a real size, in a desktop window and in
    // a 375 px frame, a common phone width (headless Chromium's own windows
    // are at least 500 px wide, so the phone is a frame).
    let probe = out.join("probe.html");
    std::fs::write(
        &probe,
        html.replace("</body>", &format!("{HARNESS}</body>")),
    )
    .unwrap();
    let phone = out.join("phone.html");
    std::fs::write(&phone, FRAMED.replace("WIDTH", "375")).unwrap();
    let desktop = out.join("desktop.html");
    std::fs::write(&desktop, FRAMED.replace("WIDTH", "1280")).unwrap();
    for (page, width, min_px) in [
        (&probe, 1000, 300),
        (&desktop, 1280, 300),
        (&phone, 375, 250),
    ] {
        let (dom, stderr) = browse(
            &bin,
            &d.dir,
            page,
            &[
                "--dump-dom".into(),
                "--allow-file-access-from-files".into(),
                if width > 1000 {
                    "--window-size=1400,2000".into()
                } else {
                    "--window-size=1000,2000".into()
                },
            ],
        );
        let report = harness_report(&dom)
            .unwrap_or_else(|| panic!("no harness report at {width} px; stderr: {stderr}"));
        let tables: Vec<&String> = report.iter().filter(|l| l.starts_with("table ")).collect();
        // Every table of the card (details included) is measured.
        assert_eq!(tables.len(), html.matches("<table").count(), "{report:?}");
        assert_eq!(report.len(), figures + tables.len() + 2, "{report:?}");
        // At desktop width no table scrolls sideways; on a phone a wide
        // table may scroll inside its own box, but the page does not.
        if width >= 1000 {
            for t in &tables {
                let excess: i64 = t.rsplit(' ').next().unwrap().parse().unwrap();
                assert!(excess <= 0, "{t} px wider than its box at {width} px");
            }
        }
        let answer = &report[figures + tables.len()];
        let (aw, ah) = answer
            .trim_start_matches("answer ")
            .split_once('x')
            .map(|(w, h)| (w.parse::<f64>().unwrap(), h.parse::<f64>().unwrap()))
            .unwrap();
        assert!(
            aw >= 150.0 && aw <= width as f64 && ah > 60.0,
            "the interval figure at {width} px: {answer}"
        );
        for line in &report[..figures] {
            let parts: Vec<&str> = line.split([' ', 'x']).collect();
            let (w, h, elements): (f64, f64, usize) = (
                parts[parts.len() - 3].parse().unwrap(),
                parts[parts.len() - 2].parse().unwrap(),
                parts[parts.len() - 1].parse().unwrap(),
            );
            assert!(w >= min_px as f64 && h > 100.0, "{line} at width {width}");
            assert!(
                w <= width as f64,
                "{line} wider than the page at {width} px"
            );
            assert!(elements > 20, "{line}: the SVG is nearly empty");
        }
        let overflow: i64 = report[report.len() - 1]
            .trim_start_matches("overflow ")
            .parse()
            .unwrap();
        assert!(
            overflow <= 0,
            "the page scrolls sideways at {width} px: {overflow} px"
        );
    }

    // 3. It prints.
    let pdf = d.dir.join("card.pdf");
    browse(
        &bin,
        &d.dir,
        &card,
        &[
            format!("--print-to-pdf={}", pdf.display()),
            "--no-pdf-header-footer".into(),
        ],
    );
    let pdf = std::fs::read(&pdf).expect("a PDF");
    assert!(pdf.starts_with(b"%PDF-"), "not a PDF");
    assert!(pdf.len() > 20_000);
}
