//! `report.html` in a real browser: headless Chromium loads the page of a small run,
//! the page's own script reports no script errors and a drawn bounding box for every
//! figure, the browser's console log has no errors, and a screenshot is not blank.
//!
//! Chromium: `$NGREACH_CHROMIUM`, else `/usr/bin/chromium` (`.ci/run` installs the
//! distribution's package when it is missing). Without a browser the test fails, unless
//! `NGREACH_SKIP_BROWSER_TEST=1` says to skip it (it then says so loudly).

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::*;

fn chromium() -> Option<PathBuf> {
    let p = std::env::var_os("NGREACH_CHROMIUM")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("/usr/bin/chromium"));
    p.is_file().then_some(p)
}

fn browser(exe: &Path, profile: &Path, extra: &[&str], page: &Path) -> std::process::Output {
    Command::new(exe)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--enable-logging=stderr",
            "--v=0",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(extra)
        .arg(format!("file://{}", page.display()))
        .output()
        .expect("chromium starts")
}

#[test]
fn report_page_renders_in_headless_chromium() {
    let Some(exe) = chromium() else {
        if std::env::var("NGREACH_SKIP_BROWSER_TEST").as_deref() == Ok("1") {
            eprintln!(
                "\n!!! SKIPPED: no Chromium at /usr/bin/chromium or $NGREACH_CHROMIUM, and NGREACH_SKIP_BROWSER_TEST=1: report.html was NOT tested in a browser !!!\n"
            );
            return;
        }
        panic!(
            "no Chromium at /usr/bin/chromium or $NGREACH_CHROMIUM: install it (apt-get install -y chromium) or set NGREACH_SKIP_BROWSER_TEST=1 to skip"
        );
    };
    let dir = std::env::temp_dir().join(format!("ngreach-browser-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    let out = dir.join("run");
    let o = run(&[
        "run",
        "tests/data/scenario_small.toml",
        "--out",
        out.to_str().unwrap(),
        "--quiet",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let page = out.join("report.html");
    let html = std::fs::read_to_string(&page).unwrap();
    // Self-contained: no external resources of any kind.
    for bad in [
        "src=\"http",
        "href=\"http",
        "url(http",
        "@import",
        "<link",
        "<img",
    ] {
        assert!(!html.contains(bad), "report.html has `{bad}`");
    }
    let figures = html.matches("<figure").count();
    assert!(figures >= 8, "{figures} figures");

    let profile = dir.join("profile");
    let dom = browser(&exe, &profile, &["--dump-dom"], &page);
    assert!(dom.status.success(), "{}", stderr(&dom));
    let dom_text = stdout(&dom);
    assert!(
        dom_text.contains("data-loaded=\"yes\""),
        "page did not finish loading"
    );
    assert!(
        dom_text.contains("data-script-errors=\"0\""),
        "script errors on the page"
    );
    assert!(
        dom_text.contains(&format!("data-figures-drawn=\"{figures}\"")),
        "not every figure drew: {}",
        dom_text.lines().take(3).collect::<Vec<_>>().join("\n")
    );
    for needle in [
        "Headline",
        "Crossover",
        "Per redshift bin",
        "Methods",
        "Komatsu",
    ] {
        assert!(dom_text.contains(needle), "no `{needle}` in the page");
    }
    let log = stderr(&dom);
    let console_errors: Vec<&str> = log
        .lines()
        .filter(|l| l.contains("CONSOLE") && (l.contains("Error") || l.contains("Uncaught")))
        .map(str::trim)
        .collect();
    assert!(
        console_errors.is_empty(),
        "console errors: {console_errors:?}"
    );

    let shot = dir.join("report.png");
    let o = browser(
        &exe,
        &profile,
        &[
            "--window-size=1280,2000",
            "--hide-scrollbars",
            &format!("--screenshot={}", shot.display()),
        ],
        &page,
    );
    assert!(o.status.success(), "{}", stderr(&o));
    let dec = png::Decoder::new(std::fs::File::open(&shot).unwrap());
    let mut reader = dec.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    let px = &buf[..info.buffer_size()];
    let step = info.color_type.samples();
    let dark = px
        .chunks(step)
        .filter(|c| (c[0] as u32 + c[1] as u32 + c[2] as u32) < 300)
        .count();
    let total = px.len() / step;
    assert!(
        dark > total / 200,
        "screenshot looks blank: {dark} dark pixels of {total}"
    );
    std::fs::remove_dir_all(&dir).ok();
}
