//! The review page in a real browser: Debian's chromium, headless, renders the pages that
//! `tagweave serve` makes for the trained demo archive. It searches a keyword, opens a
//! picture, accepts a suggestion with the form the browser rendered, and the sidecar on
//! disk must then carry the tag. Screenshots land in target/review-page-screenshots/.
//!
//! Headless chromium cannot click without a remote-control protocol, so the accept form's
//! POST is sent by the test with exactly the fields of the form in the browser's DOM (its
//! hidden token and its button's name and value); every page is rendered by chromium.
//! Without chromium (`apt-get install chromium`) the test says so and passes.

mod common;
mod review_page_support;

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use review_page_support::*;

/// The browser, when this machine has one.
fn chromium() -> Option<&'static str> {
    ["chromium", "chromium-browser"].into_iter().find(|name| {
        Command::new(name)
            .arg("--version")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status()
            .is_ok_and(|s| s.success())
    })
}

fn screenshot_dir() -> PathBuf {
    let target = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .parent()
        .expect("the target folder")
        .to_path_buf();
    let dir = target.join("review-page-screenshots");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// Runs headless chromium once with a fresh profile, no network chatter, and a time limit;
/// returns what it printed.
fn run_chromium(browser: &str, args: &[String]) -> String {
    let profile = tempfile::tempdir().unwrap();
    let mut child = Command::new(browser)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
            "--window-size=1280,1000",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("chromium starts");
    let mut stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut out = String::new();
        std::io::Read::read_to_string(&mut stdout, &mut out).ok();
        out
    });
    let started = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if started.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within 60 s: {args:?}");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    reader.join().unwrap()
}

/// The DOM after chromium loaded the page.
fn dom(browser: &str, url: &str) -> String {
    let out = run_chromium(browser, &["--dump-dom".to_string(), url.to_string()]);
    assert!(out.contains("</html>"), "no DOM for {url}: {out}");
    out
}

fn screenshot(browser: &str, url: &str, name: &str) -> PathBuf {
    let path = screenshot_dir().join(name);
    let _ = std::fs::remove_file(&path);
    run_chromium(
        browser,
        &[format!("--screenshot={}", path.display()), url.to_string()],
    );
    let bytes = std::fs::read(&path).unwrap_or_else(|_| panic!("no screenshot of {url}"));
    // source: PNG signature, ISO/IEC 15948 §5.2.
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "{name} is a PNG");
    assert!(
        bytes.len() > 20_000,
        "{name} is a real page, {} bytes",
        bytes.len()
    );
    path
}

#[test]
fn search_open_and_accept_in_a_real_browser() {
    let Some(browser) = chromium() else {
        eprintln!("skipped: chromium not installed");
        return;
    };
    let started = Instant::now();
    let folder = trained_copy();
    let root = folder.path();
    let served = Served::start(root, &[]);
    let truth: std::collections::BTreeMap<String, TruthRow> = demo_truth()
        .into_iter()
        .map(|r| (r.file.clone(), r))
        .collect();

    // Search a keyword the way the form sends it.
    let search_url = format!("{}?q=harbour", served.url);
    let page = dom(browser, &search_url);
    assert!(page.contains("pictures for “harbour”"), "{page}");
    let ids = attr_values(&page, "class=\"card\"", "data-id");
    let pictures = attr_values(&page, "/thumbnail\"", "alt");
    assert_eq!(ids.len(), 24);
    assert_eq!(pictures.len(), 24);
    // (The legend above the grid shows one of each mark too.)
    let grid = &page[page.find("<ul class=\"grid\">").expect("a grid")..];
    let carries = grid.matches("class=\"badge carries\"").count();
    let inferred = grid.matches("class=\"badge inferred\"").count();
    assert_eq!(carries + inferred, 24);
    // source: TRUTH.csv written_tags — the marks the browser shows agree with the sidecars.
    let expected_carries = pictures
        .iter()
        .filter(|p| {
            truth
                .get(p.as_str())
                .is_some_and(|r| r.written_tags.iter().any(|t| t == "harbour"))
        })
        .count();
    assert_eq!(carries, expected_carries);
    let search_shot = screenshot(browser, &search_url, "search.png");

    // Open the first result that has a text sidecar (so the change is easy to read back).
    let (id, picture) = ids
        .iter()
        .zip(&pictures)
        .find(|(_, p)| truth.get(p.as_str()).is_some_and(|r| r.sidecar == "txt"))
        .map(|(i, p)| (i.clone(), p.clone()))
        .expect("a result with a text sidecar");
    let picture_url = format!("{}picture/{id}", served.url);
    let page = dom(browser, &picture_url);
    assert!(page.contains(&format!("src=\"/picture/{id}/large\"")));
    let accept_tags = attr_values(&page, "data-action=\"accept\"", "data-tag");
    assert!(!accept_tags.is_empty(), "no suggestion to accept: {page}");
    let tag = accept_tags[0].clone();
    let token = token_in(&page).expect("the rendered form carries the token");
    assert_eq!(token.len(), 32);

    // Accept it: the POST the rendered form makes (token, then the button's name=value).
    let sidecar = text_sidecar_of(root, &picture);
    let before = text_sidecar_tags(&sidecar);
    assert!(!before.contains(&tag));
    let answer = served.post_with(
        &format!("/picture/{id}/tags"),
        &format!("token={token}&add={}", form_value(&tag)),
        &[
            ("Origin", served.url.trim_end_matches('/')),
            ("Sec-Fetch-Site", "same-origin"),
        ],
    );
    assert_eq!(answer.status, 200, "{}", answer.text());
    let after = text_sidecar_tags(&sidecar);
    let mut expected = before.clone();
    expected.push(tag.clone());
    assert_eq!(after, expected, "the sidecar gained exactly {tag}");
    assert!(
        sidecar.with_extension("txt.orig").is_file(),
        "original kept"
    );

    // The browser now shows the tag among the picture's tags, written but not yet indexed.
    let page = dom(browser, &picture_url);
    let now = attr_values(&page, "class=\"current\"", "data-tag");
    assert!(now.contains(&tag), "{now:?}");
    assert!(page.contains("run <code>tagweave scan</code> to index the new tags"));
    let picture_shot = screenshot(browser, &picture_url, "picture.png");

    // The review queue renders too.
    let review_url = format!("{}review", served.url);
    let page = dom(browser, &review_url);
    assert!(page.matches("class=\"entry\"").count() >= 10, "{page}");
    let review_shot = screenshot(browser, &review_url, "review.png");

    eprintln!(
        "screenshots: {}, {}, {} ({:.1} s)",
        search_shot.display(),
        picture_shot.display(),
        review_shot.display(),
        started.elapsed().as_secs_f64()
    );
}
