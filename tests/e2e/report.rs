//! The demo end to end, as a new user runs it: `tessera demo` writes a
//! report that is one self-contained page, parses without errors in a
//! strict HTML5 parser (html5lib, the WHATWG parsing algorithm), and loads
//! in headless Chromium without console messages; the screenshot is kept
//! in the target directory.
//!
//! The HTML parser and the browser are outside tools: `.ci/run` installs
//! them and sets `TESSERA_REQUIRE_TOOLS=1`, so there their absence fails
//! the test. Elsewhere the checks that need them are skipped with a message.

use crate::harness::*;
use std::path::Path;
use std::process::Command;

fn required() -> bool {
    tools_required()
}

fn python() -> String {
    std::env::var("TESSERA_PYTHON").unwrap_or_else(|_| "python3".to_string())
}

fn chromium() -> Option<String> {
    if let Ok(c) = std::env::var("TESSERA_CHROMIUM") {
        return Some(c);
    }
    ["chromium", "chromium-browser"]
        .iter()
        .find(|c| {
            Command::new(c)
                .arg("--version")
                .output()
                .is_ok_and(|o| o.status.success())
        })
        .map(|c| c.to_string())
}

/// Every `src` and `href` value in the page.
fn links(html: &str) -> Vec<String> {
    let mut out = Vec::new();
    for attr in ["src=\"", "href=\""] {
        let mut rest = html;
        while let Some(i) = rest.find(attr) {
            let after = &rest[i + attr.len()..];
            let end = after.find('"').unwrap_or(after.len());
            out.push(after[..end].chars().take(40).collect());
            rest = &after[end..];
        }
    }
    out
}

fn validate_html(index: &Path) {
    let script = "import sys, html5lib\n\
                  p = html5lib.HTMLParser(strict=True)\n\
                  p.parse(open(sys.argv[1], 'rb'))\n\
                  print('valid')\n";
    let have = Command::new(python())
        .args(["-c", "import html5lib"])
        .output()
        .is_ok_and(|o| o.status.success());
    if !have {
        assert!(
            !required(),
            "html5lib is required (TESSERA_REQUIRE_TOOLS) but {} cannot import it",
            python()
        );
        eprintln!(
            "skipped: the strict HTML5 parse (no html5lib for {}); .ci/run installs it",
            python()
        );
        return;
    }
    let out = Command::new(python())
        .args(["-c", script])
        .arg(index)
        .output()
        .expect("run python");
    assert!(
        out.status.success(),
        "the report does not parse as HTML5:\n{}",
        text(&out.stderr)
    );
}

fn render_in_browser(index: &Path, shot: &Path) {
    let Some(browser) = chromium() else {
        assert!(
            !required(),
            "Chromium is required (TESSERA_REQUIRE_TOOLS) but not found"
        );
        eprintln!("skipped: loading the report in Chromium (not installed); .ci/run installs it");
        return;
    };
    let profile = tempfile::tempdir().expect("profile dir");
    let out = Command::new(&browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--hide-scrollbars",
            "--enable-logging=stderr",
            "--v=0",
            "--window-size=1280,6000",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg(format!("--screenshot={}", shot.display()))
        .arg(format!("file://{}", index.display()))
        .output()
        .expect("run chromium");
    let log = text(&out.stderr);
    assert!(out.status.success(), "chromium failed:\n{log}");
    // The page has no scripts: any console message is an error (a failed
    // resource, a blocked fetch, a script someone injected).
    let console: Vec<&str> = log.lines().filter(|l| l.contains(":CONSOLE")).collect();
    assert!(
        console.is_empty(),
        "console messages:\n{}",
        console.join("\n")
    );
    let bytes = std::fs::read(shot).expect("screenshot written");
    assert!(bytes.starts_with(b"\x89PNG"), "a PNG screenshot");
    assert!(
        bytes.len() > 50_000,
        "the screenshot is nearly empty ({} bytes)",
        bytes.len()
    );
    eprintln!("screenshot of the report: {}", shot.display());
}

#[test]
fn demo_writes_a_report_that_validates_and_renders() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().join("demo");
    let out = tessera()
        .args(["demo", "--workers", "2", "--out"])
        .arg(&dir)
        .output()
        .expect("start tessera");
    ok(&out, "tessera demo");
    let stdout = text(&out.stdout);
    assert!(
        stdout.contains("main effect of height_sd on territory_cv"),
        "{stdout}"
    );
    assert!(stdout.contains("report/index.html"), "{stdout}");
    let index = dir.join("report").join("index.html");
    let html = std::fs::read_to_string(&index).expect("index.html");

    // One self-contained page: every image and link is inline or on the page.
    for l in links(&html) {
        assert!(
            l.starts_with("data:") || l.starts_with('#'),
            "the page refers to {l:?}: it must open offline"
        );
    }
    for section in [
        "Before you use these numbers",
        "Which constants matter",
        "How each metric moves with each constant",
        "The two constants that matter most",
        "Calibration to the targets",
        "Can the surrogates be trusted?",
        "territory_cv against height_sd",
    ] {
        assert!(html.contains(section), "the report has no {section:?}");
    }
    let figures = html
        .matches("<img src=\"data:image/svg+xml;base64,")
        .count();
    assert!(figures >= 20, "{figures} figures");
    let pngs = std::fs::read_dir(dir.join("report").join("figures"))
        .expect("figures dir")
        .filter(|e| {
            e.as_ref()
                .is_ok_and(|e| e.path().extension().is_some_and(|x| x == "png"))
        })
        .count();
    assert!(pngs >= 20, "{pngs} PNG figures");

    validate_html(&index);
    let shot = Path::new(env!("CARGO_TARGET_TMPDIR")).join("report-screenshot.png");
    render_in_browser(&index, &shot);
}
