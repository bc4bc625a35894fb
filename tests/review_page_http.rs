//! `tagweave serve` over HTTP, run as a user would: every route's status and content
//! type, path-traversal attempts, and who may change tags (this run's token, read-only
//! mode), with the sidecars on disk checked after each change. All on a scanned and
//! trained copy of the demo archive (see review_page_support.rs).

mod common;
mod review_page_support;

use std::collections::{BTreeMap, BTreeSet};

use common::*;
use review_page_support::*;

/// TRUTH.csv by file, plus the odd-named picture the tests add (its sidecar's tags).
fn truth() -> BTreeMap<String, TruthRow> {
    let mut rows: BTreeMap<String, TruthRow> = demo_truth()
        .into_iter()
        .map(|r| (r.file.clone(), r))
        .collect();
    let odd_tags: Vec<String> = ODD_TAGS.lines().map(str::to_string).collect();
    rows.insert(
        ODD_PICTURE.to_string(),
        TruthRow {
            file: ODD_PICTURE.to_string(),
            sidecar: "txt".to_string(),
            true_tags: odd_tags.clone(),
            written_tags: odd_tags,
            removed_tags: Vec::new(),
            false_tags: Vec::new(),
        },
    );
    rows
}

/// `(id, picture, badge)` of every card of a grid page.
fn cards(html: &str) -> Vec<(String, String, String)> {
    html.split("<li class=\"card\"")
        .skip(1)
        .map(|card| {
            let id = attr_values(&format!("<x{card}"), "data-id", "data-id")[0].clone();
            let picture = attr_values(card, "img src", "alt")[0].clone();
            let badge = ["carries", "inferred"]
                .into_iter()
                .find(|b| card.contains(&format!("class=\"badge {b}\"")))
                .unwrap_or("")
                .to_string();
            (id, picture, badge)
        })
        .collect()
}

fn assert_page(answer: &Answer, status: u16) -> String {
    assert_eq!(answer.status, status, "{}", answer.text());
    assert_eq!(answer.content_type(), "text/html; charset=utf-8");
    let text = answer.text();
    assert!(text.starts_with("<!doctype html>"), "{text}");
    text
}

#[test]
fn every_route_answers_with_its_status_and_content_type() {
    let folder = trained_copy();
    let served = Served::start(folder.path(), &[]);
    let truth = truth();

    // Search page, empty: the form and every tag the model knows.
    let home = assert_page(&served.get("/"), 200);
    assert!(home.contains("<form method=\"get\" action=\"/\""));
    let known: BTreeSet<String> = truth
        .values()
        .filter(|r| r.file != ODD_PICTURE)
        .flat_map(|r| r.written_tags.iter().cloned())
        .collect();
    for tag in &known {
        assert!(home.contains(&format!(">{tag}</a>")), "tag {tag} missing");
    }
    assert!(
        home.contains(">&lt;i&gt;loud&lt;/i&gt;</a>"),
        "escaped in the cloud"
    );
    // source: RFC 9110 §9.3.2 — HEAD answers the GET headers without a body.
    let head = request(served.port, "HEAD", "/", &[], b"");
    assert_eq!(head.status, 200);
    assert!(head.body.is_empty());
    assert_eq!(
        head.header("Content-Length").and_then(|l| l.parse().ok()),
        Some(served.get("/").body.len())
    );

    let css = served.get("/style.css");
    assert_eq!(css.status, 200);
    assert_eq!(css.content_type(), "text/css; charset=utf-8");
    assert!(css.text().contains(".grid"));

    // A search: each card's mark agrees with what its sidecar carries.
    // source: demo-collection/TRUTH.csv, written_tags (what the sidecars say).
    let page = assert_page(&served.get("/?q=night+harbour"), 200);
    let found = cards(&page);
    assert_eq!(found.len(), 24, "default grid size");
    let mut marks = BTreeMap::new();
    for (id, picture, badge) in &found {
        assert_eq!(*id, id_of(picture));
        let row = &truth[picture];
        let carries = ["night", "harbour"]
            .iter()
            .all(|t| row.written_tags.iter().any(|w| w == t));
        assert_eq!(
            badge,
            if carries { "carries" } else { "inferred" },
            "{picture}"
        );
        *marks.entry(badge.clone()).or_insert(0) += 1;
        assert!(page.contains(&format!("src=\"/picture/{id}/thumbnail\"")));
    }
    assert!(marks.contains_key("carries"), "{marks:?}");
    assert_eq!(cards(&served.get("/?q=night&limit=5").text()).len(), 5);
    let untagged = cards(&assert_page(&served.get("/?q=snow&untagged=on"), 200));
    assert!(!untagged.is_empty());
    for (_, picture, badge) in &untagged {
        assert!(
            truth[picture].written_tags.is_empty(),
            "{picture} is tagged"
        );
        assert_eq!(badge, "inferred");
    }
    let unknown = assert_page(&served.get("/?q=night+zeppelin"), 400);
    assert!(unknown.contains("zeppelin"), "{unknown}");
    assert!(cards(&unknown).is_empty());

    // A picture's page: its sidecar's tags, then suggestions it does not carry.
    let picture = "1950s/saltmarrow-0001.png";
    let id = id_of(picture);
    let page = assert_page(&served.get(&format!("/picture/{id}")), 200);
    let now: BTreeSet<String> = attr_values(&page, "class=\"current\"", "data-tag")
        .into_iter()
        .collect();
    let written: BTreeSet<String> = truth[picture].written_tags.iter().cloned().collect();
    assert_eq!(now, written, "source: TRUTH.csv written_tags of {picture}");
    let suggested = attr_values(&page, "class=\"suggestion\"", "data-tag");
    assert!(
        !suggested.is_empty() && suggested.len() <= 8,
        "{suggested:?}"
    );
    assert!(suggested.iter().all(|t| !written.contains(t)));
    // The tag left off this sidecar on purpose (TRUTH removed_tags) is suggested.
    for left_off in &truth[picture].removed_tags {
        assert!(
            suggested.contains(left_off),
            "{left_off} not in {suggested:?}"
        );
    }
    assert!(token_in(&page).is_some_and(|t| t.len() == 32));

    for (route, max_side) in [("thumbnail", 240), ("large", 1200)] {
        let jpeg = served.get(&format!("/picture/{id}/{route}"));
        assert_eq!(jpeg.status, 200, "{route}");
        assert_eq!(jpeg.content_type(), "image/jpeg");
        let shown = image::load_from_memory(&jpeg.body).expect("a JPEG that decodes");
        let (w, h) = image::image_dimensions(folder.path().join(picture)).unwrap();
        let scale = (max_side as f64 / w.max(h) as f64).min(1.0);
        let expected = (
            (w as f64 * scale).round() as u32,
            (h as f64 * scale).round() as u32,
        );
        assert_eq!((shown.width(), shown.height()), expected, "{route}");
    }
    let cached = std::fs::read_dir(folder.path().join(".tagweave/thumbnails"))
        .unwrap()
        .count();
    assert_eq!(cached, 2, "one copy per size, kept in the store");

    // "Like this, but…": never the picture itself; badges follow the toward tags.
    let like = assert_page(
        &served.get(&format!("/picture/{id}/like?away=night&toward=day")),
        200,
    );
    let shifted = cards(&like);
    assert!(!shifted.is_empty());
    for (other, picture, badge) in &shifted {
        assert_ne!(*other, id);
        let carries = truth[picture].written_tags.iter().any(|t| t == "day");
        assert_eq!(badge, if carries { "carries" } else { "inferred" });
    }
    assert_page(&served.get(&format!("/picture/{id}/like")), 400);
    assert_page(
        &served.get(&format!("/picture/{id}/like?toward=zeppelin")),
        400,
    );

    // Review queue: the same list as `tagweave audit`, worst first, page by page.
    let queue = assert_page(&served.get("/review"), 200);
    let listed = attr_values(&queue, "class=\"entry\"", "data-id");
    assert_eq!(listed.len(), 20, "first page");
    let audit = review_page_audit();
    let expected: Vec<String> = audit.iter().take(20).map(|p| id_of(p)).collect();
    assert_eq!(
        listed, expected,
        "source: `tagweave audit --json` on the same store"
    );
    let second = assert_page(&served.get("/review?page=2"), 200);
    let second_ids = attr_values(&second, "class=\"entry\"", "data-id");
    let expected: Vec<String> = audit.iter().skip(20).take(20).map(|p| id_of(p)).collect();
    assert_eq!(second_ids, expected);
    assert_page(&served.get("/review?page=9999"), 200);

    // Wrong methods, unknown addresses, foreign hosts.
    let post_home = request(served.port, "POST", "/", &[], b"");
    assert_eq!(post_home.status, 405);
    assert_eq!(post_home.header("Allow"), Some("GET, HEAD"));
    assert_eq!(
        request(served.port, "PUT", "/review", &[], b"x").status,
        405
    );
    let get_tags = served.get(&format!("/picture/{id}/tags"));
    assert_eq!(get_tags.status, 405);
    assert_eq!(get_tags.header("Allow"), Some("POST"));
    assert_page(&served.get("/nothing-here"), 404);
    // source: DNS rebinding — a page on another name that resolves to 127.0.0.1 would
    // send its own Host; refusing it keeps such a page from reading ours (and the token).
    let rebound = request(
        served.port,
        "GET",
        "/",
        &[("Host", &format!("attacker.example:{}", served.port))],
        b"",
    );
    assert_eq!(rebound.status, 403);
    assert!(token_in(&rebound.text()).is_none());

    // Collection text is escaped, never markup.
    let odd = assert_page(
        &served.get(&format!("/picture/{}", id_of(ODD_PICTURE))),
        200,
    );
    assert!(!odd.contains(ODD_TAG) && !odd.contains("<b>bold"), "{odd}");
    assert!(odd.contains("&lt;i&gt;loud&lt;/i&gt;"));
    assert!(odd.contains("&lt;b&gt;bold &amp; &quot;q&quot;.jpg"));

    // Pages carry the headers that keep other pages out.
    let answer = served.get("/");
    assert_eq!(answer.header("Cache-Control"), Some("no-store"));
    assert!(answer
        .header("Content-Security-Policy")
        .is_some_and(|p| p.contains("frame-ancestors 'none'") && p.contains("default-src 'none'")));
    assert_eq!(answer.header("X-Content-Type-Options"), Some("nosniff"));
}

/// Flagged pictures of `tagweave audit --json` on the trained template, worst first.
fn review_page_audit() -> Vec<String> {
    use std::sync::OnceLock;
    static AUDIT: OnceLock<Vec<String>> = OnceLock::new();
    AUDIT
        .get_or_init(|| {
            let folder = trained_copy();
            let out = tagweave(
                folder.path(),
                &[
                    "audit",
                    "--json",
                    "--limit",
                    "100000",
                    "--sheet",
                    "review.csv",
                ],
            );
            assert!(out.status.success(), "{}", stderr_of(&out));
            json(&out)["queue"]
                .as_array()
                .unwrap()
                .iter()
                .filter(|d| !d["disputed"].as_array().unwrap().is_empty())
                .map(|d| d["picture"].as_str().unwrap().to_string())
                .collect()
        })
        .clone()
}

#[test]
fn traversal_attempts_and_unknown_ids_are_not_found() {
    let folder = trained_copy();
    let served = Served::start(folder.path(), &[]);
    let real = id_of("1950s/saltmarrow-0001.png");
    let attempts = [
        "/picture/../../etc/passwd".to_string(),
        "/picture/../../../../../../etc/passwd/thumbnail".to_string(),
        "/../../../../etc/passwd".to_string(),
        "/picture/..%2f..%2f..%2fetc%2fpasswd".to_string(),
        "/picture/%2e%2e%2f%2e%2e%2fetc%2fpasswd/large".to_string(),
        "/picture/%2e%2e/thumbnail".to_string(),
        "/picture/%252e%252e%252fetc%252fpasswd/large".to_string(),
        "/picture/..%5c..%5cetc%5cpasswd/thumbnail".to_string(),
        "/picture//etc/passwd".to_string(),
        "/picture/%2Fetc%2Fpasswd/thumbnail".to_string(),
        "//etc/passwd".to_string(),
        "/etc/passwd".to_string(),
        "http://127.0.0.1/etc/passwd".to_string(),
        "/picture/1950s/saltmarrow-0001.png".to_string(),
        "/picture/1950s%2Fsaltmarrow-0001.png/large".to_string(),
        "/1950s/saltmarrow-0001.png".to_string(),
        "/.tagweave/db/conf".to_string(),
        "/picture/0123456789abcdef".to_string(),
        "/picture/0123456789abcdef/thumbnail".to_string(),
        format!("/picture/{}", real.to_uppercase()),
        format!("/picture/{real}0/thumbnail"),
        format!("/picture/{}/large", &real[..15]),
        format!("/picture/{real}%00/large"),
        format!("/picture/{real}/../../etc/passwd"),
        format!("/picture/{real}/thumbnail/../../../etc/passwd"),
        "/style.css/../../etc/passwd".to_string(),
        "/style.css%2f..%2f..%2fetc%2fpasswd".to_string(),
    ];
    for target in &attempts {
        let answer = served.get(target);
        assert_eq!(answer.status, 404, "{target}: {}", answer.text());
        assert_eq!(
            answer.content_type(),
            "text/html; charset=utf-8",
            "{target}"
        );
        assert!(!answer.text().contains("root:"), "{target}");
    }
    // The same id, well formed, is there: the 404s above are not a broken server.
    assert_eq!(
        served.get(&format!("/picture/{real}/thumbnail")).status,
        200
    );
}

#[test]
fn changes_need_this_runs_token_and_go_through_the_safe_write() {
    let folder = trained_copy();
    let root = folder.path();
    let truth = truth();
    // source: TRUTH.csv — a picture whose text sidecar left a true tag off on purpose.
    let row = truth
        .values()
        .find(|r| r.sidecar == "txt" && !r.removed_tags.is_empty())
        .unwrap();
    let picture = row.file.clone();
    let missing = row.removed_tags[0].clone();
    let id = id_of(&picture);
    let sidecar = text_sidecar_of(root, &picture);
    let before = std::fs::read(&sidecar).unwrap();
    let add = format!("add={}", form_value(&missing));
    let target = format!("/picture/{id}/tags");

    let served = Served::start(root, &[]);
    let token = served.token(&id);

    // Refused: no token, a wrong one, a right one from another site or host.
    let refused = [
        served.post(&target, &add),
        served.post(&target, &format!("token=&{add}")),
        served.post(&target, &format!("token={}&{add}", "0".repeat(32))),
        served.post(&target, &format!("token={}&{add}", &token[..31])),
        served.post_with(
            &target,
            &format!("token={token}&{add}"),
            &[("Origin", "http://attacker.example")],
        ),
        served.post_with(
            &target,
            &format!("token={token}&{add}"),
            &[("Origin", "null")],
        ),
        served.post_with(
            &target,
            &format!("token={token}&{add}"),
            &[("Sec-Fetch-Site", "cross-site")],
        ),
        served.post_with(
            &target,
            &format!("token={token}&{add}"),
            &[("Host", &format!("attacker.example:{}", served.port))],
        ),
    ];
    for (i, answer) in refused.iter().enumerate() {
        assert_eq!(answer.status, 403, "attempt {i}: {}", answer.text());
    }
    assert!(refused[0].text().contains("token"));
    assert_eq!(std::fs::read(&sidecar).unwrap(), before, "nothing written");
    assert!(!root.join(format!("{}.orig", sidecar.display())).exists());
    // An unknown picture with the right token is still not found.
    let unknown = served.post(
        "/picture/0123456789abcdef/tags",
        &format!("token={token}&{add}"),
    );
    assert_eq!(unknown.status, 404);

    // With this run's token: written the way `apply` writes.
    let answer = served.post_with(
        &target,
        &format!("token={token}&{add}"),
        &[("Origin", &format!("http://127.0.0.1:{}", served.port))],
    );
    let page = assert_page(&answer, 200);
    let mut expected: Vec<String> = row.written_tags.clone();
    expected.push(missing.clone());
    let on_disk = text_sidecar_tags(&sidecar);
    assert_eq!(
        on_disk.iter().collect::<BTreeSet<_>>(),
        expected.iter().collect::<BTreeSet<_>>(),
        "source: TRUTH.csv written_tags + the accepted tag"
    );
    let original = sidecar.with_extension("txt.orig");
    assert_eq!(std::fs::read(&original).unwrap(), before, "original kept");
    assert!(page.contains(&format!("Added “{missing}”")), "{page}");
    assert!(page.contains("run <code>tagweave scan</code> to index the new tags"));
    assert!(
        page.contains(&format!("+{missing}")),
        "the diff is shown: {page}"
    );
    let after = assert_page(&served.get(&format!("/picture/{id}")), 200);
    let now = attr_values(&after, "class=\"current\"", "data-tag");
    assert!(now.contains(&missing), "{now:?}");
    assert!(after.contains("written now, not yet indexed"));
    assert!(!attr_values(&after, "class=\"suggestion\"", "data-tag").contains(&missing));
    // Accepting again writes nothing more.
    let again = served.post(&target, &format!("token={token}&{add}"));
    assert!(assert_page(&again, 200).contains("Nothing to write"));
    assert_eq!(text_sidecar_tags(&sidecar).len(), expected.len());

    // Removing a tag the archive falsified on purpose (TRUTH false_tags).
    let wrong = truth
        .values()
        .find(|r| r.sidecar == "txt" && !r.false_tags.is_empty() && r.file != picture)
        .unwrap();
    let false_tag = &wrong.false_tags[0];
    let wrong_sidecar = text_sidecar_of(root, &wrong.file);
    let answer = served.post(
        &format!("/picture/{}/tags", id_of(&wrong.file)),
        &format!(
            "token={token}&remove={}&back=review&page=1",
            form_value(false_tag)
        ),
    );
    let page = assert_page(&answer, 200);
    assert!(
        page.contains("href=\"/review?page=1\""),
        "back to the queue"
    );
    let left: BTreeSet<String> = text_sidecar_tags(&wrong_sidecar).into_iter().collect();
    let expected: BTreeSet<String> = wrong
        .written_tags
        .iter()
        .filter(|t| *t != false_tag)
        .cloned()
        .collect();
    assert_eq!(left, expected, "only {false_tag} came out");

    // A picture without any sidecar gets a new text sidecar.
    let bare = truth.values().find(|r| r.sidecar == "none").unwrap();
    let new_sidecar = text_sidecar_of(root, &bare.file);
    assert!(!new_sidecar.exists());
    let answer = served.post(
        &format!("/picture/{}/tags", id_of(&bare.file)),
        &format!("token={token}&add=Night"),
    );
    assert!(assert_page(&answer, 200).contains("new file"));
    assert_eq!(text_sidecar_tags(&new_sidecar), vec!["night".to_string()]);

    // Rejecting a suggestion writes nothing and hides it until the server stops.
    let other = id_of("1950s/saltmarrow-0003.jpg");
    let suggested = attr_values(
        &served.get(&format!("/picture/{other}")).text(),
        "class=\"suggestion\"",
        "data-tag",
    );
    let snapshot = sidecar_snapshot(root);
    let answer = served.post(
        &format!("/picture/{other}/set-aside"),
        &format!("token={token}&tag={}", form_value(&suggested[0])),
    );
    assert_eq!(answer.status, 303);
    assert_eq!(
        answer.header("Location"),
        Some(&*format!("/picture/{other}"))
    );
    let later = attr_values(
        &served.get(&format!("/picture/{other}")).text(),
        "class=\"suggestion\"",
        "data-tag",
    );
    assert!(!later.contains(&suggested[0]), "{later:?}");
    assert_eq!(sidecar_snapshot(root), snapshot);
    // Bad forms.
    assert_eq!(served.post(&target, &format!("token={token}")).status, 400);
    assert_eq!(
        served
            .post(&target, &format!("token={token}&add=a&remove=b"))
            .status,
        400
    );
    assert_eq!(
        served
            .post(&target, &format!("token={token}&add={}", "x".repeat(101)))
            .status,
        400
    );

    // The store stays locked while serving: a scan elsewhere is refused.
    let scan = tagweave(root, &["scan", "."]);
    assert_eq!(scan.status.code(), Some(1));
    assert!(stderr_of(&scan).contains("in use"), "{}", stderr_of(&scan));

    // A new server run has a new token; the old one no longer works.
    drop(served);
    let served = Served::start(root, &[]);
    let stale = served.post(
        &format!("/picture/{other}/tags"),
        &format!("token={token}&add=sea"),
    );
    assert_eq!(stale.status, 403);
    let fresh = served.token(&other);
    assert_ne!(fresh, token);
    assert_eq!(
        served
            .post(
                &format!("/picture/{other}/tags"),
                &format!("token={fresh}&add=sea")
            )
            .status,
        200
    );
}

#[test]
fn read_only_refuses_every_change() {
    let folder = trained_copy();
    let root = folder.path();
    let snapshot = sidecar_snapshot(root);
    let served = Served::start(root, &["--read-only"]);
    let id = id_of("1950s/saltmarrow-0001.png");
    for target in [
        "/".to_string(),
        format!("/picture/{id}"),
        "/review".to_string(),
    ] {
        let page = assert_page(&served.get(&target), 200);
        assert!(page.contains("--read-only"), "{target}");
        assert!(!page.contains("method=\"post\""), "{target}: {page}");
        assert!(token_in(&page).is_none(), "{target}");
    }
    for (path, form) in [
        (format!("/picture/{id}/tags"), "add=rain".to_string()),
        (
            format!("/picture/{id}/tags"),
            format!("token={}&add=rain", "a".repeat(32)),
        ),
        (format!("/picture/{id}/tags"), "remove=night".to_string()),
        (format!("/picture/{id}/set-aside"), "tag=rain".to_string()),
    ] {
        let answer = served.post(&path, &form);
        assert_eq!(answer.status, 403, "{path} {form}");
        assert!(answer.text().contains("--read-only"), "{}", answer.text());
    }
    // Looking still works, and still makes thumbnails (a cache, not a change).
    assert_eq!(served.get(&format!("/picture/{id}/thumbnail")).status, 200);
    assert_eq!(sidecar_snapshot(root), snapshot, "no sidecar changed");
}

#[test]
fn serve_says_what_to_do_without_a_trained_store() {
    let temp = tempfile::tempdir().unwrap();
    let out = tagweave(temp.path(), &["serve", "--port", "0"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr_of(&out).contains("tagweave scan"),
        "{}",
        stderr_of(&out)
    );
}
