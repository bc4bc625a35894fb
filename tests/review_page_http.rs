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
    let head = served.send("HEAD", "/", &[], b"");
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
        assert_eq!(*id, served.id_of(picture));
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
    let id = served.id_of(picture);
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
    let expected: Vec<String> = audit.iter().take(20).map(|p| served.id_of(p)).collect();
    assert_eq!(
        listed, expected,
        "source: `tagweave audit --json` on the same store"
    );
    let second = assert_page(&served.get("/review?page=2"), 200);
    let second_ids = attr_values(&second, "class=\"entry\"", "data-id");
    let expected: Vec<String> = audit
        .iter()
        .skip(20)
        .take(20)
        .map(|p| served.id_of(p))
        .collect();
    assert_eq!(second_ids, expected);
    assert_page(&served.get("/review?page=9999"), 200);

    // Wrong methods, unknown addresses, foreign hosts.
    let post_home = served.send("POST", "/", &[], b"");
    assert_eq!(post_home.status, 405);
    assert_eq!(post_home.header("Allow"), Some("GET, HEAD"));
    assert_eq!(served.send("PUT", "/review", &[], b"x").status, 405);
    let get_tags = served.get(&format!("/picture/{id}/tags"));
    assert_eq!(get_tags.status, 405);
    assert_eq!(get_tags.header("Allow"), Some("POST"));
    assert_page(&served.get("/nothing-here"), 404);
    // source: DNS rebinding — a page on another name that resolves to 127.0.0.1 would
    // send its own Host; refusing it keeps such a page from reading ours (and the token).
    let rebound = served.send(
        "GET",
        "/",
        &[("Host", &format!("attacker.example:{}", served.port))],
        b"",
    );
    assert_eq!(rebound.status, 403);
    assert!(token_in(&rebound.text()).is_none());

    // Collection text is escaped, never markup.
    let odd = assert_page(
        &served.get(&format!("/picture/{}", served.id_of(ODD_PICTURE))),
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
    let real = served.id_of("1950s/saltmarrow-0001.png");
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
        "/.tagweave/review-page.key".to_string(),
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

/// A picture whose text sidecar left a true tag off on purpose.
// source: TRUTH.csv of the demo archive (its `removed_tags` column).
fn missing_a_true_tag(truth: &BTreeMap<String, TruthRow>) -> &TruthRow {
    truth
        .values()
        .find(|r| r.sidecar == "txt" && !r.removed_tags.is_empty())
        .expect("TRUTH.csv lists a text-sidecar picture with a removed tag")
}

#[test]
fn changes_need_this_runs_token_and_go_through_the_safe_write() {
    let folder = trained_copy();
    let root = folder.path();
    let truth = truth();
    let row = missing_a_true_tag(&truth);
    let picture = row.file.clone();
    let missing = row.removed_tags[0].clone();
    let served = Served::start(root, &[]);
    let id = served.id_of(&picture);
    let sidecar = text_sidecar_of(root, &picture);
    let before = std::fs::read(&sidecar).unwrap();
    let add = format!("add={}", form_value(&missing));
    let target = format!("/picture/{id}/tags");
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
    // Sent without `from=suggestion` (as "add a tag of your own" sends it): the person's.
    let read = tagweave_collection::sidecar::read_sidecar(
        &sidecar,
        tagweave_collection::SidecarKind::Text,
    )
    .unwrap();
    assert!(read.accepted.is_empty(), "{:?}", read.accepted);
    let original = sidecar.with_extension("txt.orig");
    assert_eq!(std::fs::read(&original).unwrap(), before, "original kept");
    assert!(page.contains(&format!("Added “{missing}”")), "{page}");
    assert!(page.contains("tagweave commands in another terminal see the new tags now"));
    assert!(
        page.contains(&format!("+{missing}")),
        "the diff is shown: {page}"
    );
    let after = assert_page(&served.get(&format!("/picture/{id}")), 200);
    let now = attr_values(&after, "class=\"current\"", "data-tag");
    assert!(now.contains(&missing), "{now:?}");
    assert!(after.contains("<span class=\"note\">written now</span>"));
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
        &format!("/picture/{}/tags", served.id_of(&wrong.file)),
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
        &format!("/picture/{}/tags", served.id_of(&bare.file)),
        &format!("token={token}&add=Night"),
    );
    assert!(assert_page(&answer, 200).contains("new file"));
    assert_eq!(text_sidecar_tags(&new_sidecar), vec!["night".to_string()]);

    // Rejecting a suggestion writes nothing and hides it until the server stops.
    let other = served.id_of("1950s/saltmarrow-0003.jpg");
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

    // The page holds the store only while it writes: a scan elsewhere runs beside it.
    let scan = tagweave(root, &["scan", ".", "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));
    assert_eq!(json(&scan)["removed"], 0, "{}", stdout_of(&scan));

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
    let id = served.id_of("1950s/saltmarrow-0001.png");
    for target in [
        "/".to_string(),
        format!("/picture/{id}"),
        "/review".to_string(),
        "/one-by-one".to_string(),
        "/one-by-one?at=2".to_string(),
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

/// One place of the one-by-one walk, read from its fragment.
struct Place {
    id: String,
    picture: String,
    untagged: bool,
    total: usize,
    suggested: Vec<String>,
    /// The tags the accept-all form carries, and the count its button says.
    accept_all: Vec<String>,
    said: Option<usize>,
}

fn place(served: &Served, target: &str) -> Place {
    let answer = served.get(target);
    assert_eq!(answer.status, 200, "{target}: {}", answer.text());
    assert_eq!(answer.content_type(), "text/html; charset=utf-8");
    let part = answer.text();
    assert!(
        part.starts_with("<section class=\"one"),
        "a fragment: {part}"
    );
    let id = attr_values(&part, "section class=\"one", "data-id")[0].clone();
    let picture = attr_values(&part, "class=\"large\"", "alt")[0].clone();
    let at = part.find("class=\"where\">").unwrap() + "class=\"where\">".len();
    let place_words = &part[at..at + part[at..].find('<').unwrap()];
    // "2 of 57 · untagged"
    let total = place_words.split(' ').nth(2).unwrap().parse().unwrap();
    let form = part
        .find("class=\"all-above\"")
        .map(|at| &part[at..at + part[at..].find("</form>").unwrap()]);
    let accept_all = form
        .map(|f| attr_values(f, "name=\"add\"", "value"))
        .unwrap_or_default();
    let said = form.map(|f| {
        let words = &f[f.find("accept ").unwrap() + "accept ".len()..];
        words.split(' ').next().unwrap().parse().unwrap()
    });
    Place {
        id,
        picture,
        untagged: place_words.ends_with("· untagged"),
        total,
        suggested: attr_values(&part, "class=\"suggestion\"", "data-tag"),
        accept_all,
        said,
    }
}

#[test]
fn the_one_by_one_walk_goes_untagged_first_and_accepts_what_it_counted() {
    let folder = trained_copy();
    let root = folder.path();
    let truth = truth();
    let served = Served::start(root, &[]);

    // The page loads one script, from this server, under a policy that allows only that.
    let page = served.get("/one-by-one");
    let text = assert_page(&page, 200);
    assert!(
        text.contains("<script src=\"/queue.js\" defer></script>"),
        "{text}"
    );
    assert_eq!(text.matches("<script").count(), 1, "nothing inline");
    assert!(text.contains("<kbd>j or →</kbd>"), "the keys are shown");
    let script = served.get("/queue.js");
    assert_eq!(script.status, 200);
    // source: RFC 9239 §6 — text/javascript.
    assert_eq!(script.content_type(), "text/javascript; charset=utf-8");
    assert_eq!(script.header("X-Content-Type-Options"), Some("nosniff"));
    assert!(script.text().contains("addEventListener(\"keydown\""));
    for answer in [&page, &script] {
        let policy = answer.header("Content-Security-Policy").unwrap();
        assert!(policy.contains("script-src 'self';"), "{policy}");
        assert!(policy.contains("connect-src 'self';"), "{policy}");
        assert!(!policy.contains("unsafe"), "{policy}");
    }
    // Without the pass, neither the script nor a place of the walk.
    for target in ["/queue.js", "/one-by-one/part?at=1"] {
        assert_eq!(request(served.port, "GET", target, &[], b"").status, 403);
    }

    // Every place, in order: all the untagged pictures, then partly tagged ones.
    // source: TRUTH.csv written_tags — the untagged pictures are those without any.
    let first = place(&served, "/one-by-one/part?at=1");
    let walk: Vec<Place> = (1..=first.total)
        .map(|at| place(&served, &format!("/one-by-one/part?at={at}")))
        .collect();
    let untagged_in_walk: BTreeSet<&str> = walk
        .iter()
        .take_while(|p| p.untagged)
        .map(|p| p.picture.as_str())
        .collect();
    assert!(!untagged_in_walk.is_empty());
    assert!(
        walk.iter()
            .skip(untagged_in_walk.len())
            .all(|p| !p.untagged),
        "untagged before partly tagged"
    );
    let untagged_truth: BTreeSet<&str> = truth
        .values()
        .filter(|r| r.written_tags.is_empty())
        .map(|r| r.file.as_str())
        .collect();
    assert_eq!(untagged_in_walk, untagged_truth);
    let partly = &walk[untagged_in_walk.len()..];
    assert!(!partly.is_empty(), "the model would add tags to some");
    for p in partly {
        assert!(!truth[&p.picture].written_tags.is_empty(), "{}", p.picture);
        assert!(!p.suggested.is_empty(), "{}", p.picture);
    }
    for p in &walk {
        assert_eq!(p.said, Some(p.accept_all.len()), "{}", p.picture);
        assert_eq!(p.id, served.id_of(&p.picture));
    }
    // Past either end: the nearest place.
    assert_eq!(
        place(&served, "/one-by-one/part?at=0").picture,
        walk[0].picture
    );
    let last = format!("/one-by-one/part?at={}", walk.len() + 5);
    assert_eq!(place(&served, &last).picture, walk[walk.len() - 1].picture);

    // A partly tagged picture with a text sidecar, and a threshold low enough to take
    // two or more of its suggestions.
    let (at, chosen) = walk
        .iter()
        .enumerate()
        .skip(untagged_in_walk.len())
        .map(|(i, p)| (i + 1, p))
        .find(|(_, p)| truth[&p.picture].sidecar == "txt" && p.suggested.len() >= 3)
        .expect("a partly tagged picture with a text sidecar");
    let low = place(&served, &format!("/one-by-one/part?at={at}&above=1"));
    assert!(low.accept_all.len() >= 2, "{:?}", low.accept_all);
    let token = served.token(&chosen.id);
    let target = format!("/picture/{}/tags", chosen.id);
    let adds: String = low
        .accept_all
        .iter()
        .map(|t| format!("&add={}", form_value(t)))
        .collect();
    // The page's forms say the tags they send are suggestions accepted, not typed.
    let fragment = served
        .get(&format!("/one-by-one/part?at={at}&above=1"))
        .text();
    assert!(
        fragment.contains("<input type=\"hidden\" name=\"from\" value=\"suggestion\">"),
        "{fragment}"
    );
    let decision =
        format!("token={token}&back=one-by-one&at={at}&answer=part&from=suggestion{adds}");
    let sidecar = text_sidecar_of(root, &chosen.picture);
    let before = text_sidecar_tags(&sidecar);

    // Without the token, or without the pass, nothing is written.
    let no_token = decision.replace(&format!("token={token}&"), "");
    assert_eq!(served.post(&target, &no_token).status, 403);
    let origin = served.origin();
    let no_pass = request(
        served.port,
        "POST",
        &target,
        &[
            ("Content-Type", "application/x-www-form-urlencoded"),
            ("Origin", &origin),
        ],
        decision.as_bytes(),
    );
    assert_eq!(no_pass.status, 403);
    assert_eq!(text_sidecar_tags(&sidecar), before);

    // One request accepts them all, and answers with the picture's new fragment.
    let answer = served.post(&target, &decision);
    assert_eq!(answer.status, 200, "{}", answer.text());
    let part = answer.text();
    assert!(part.starts_with("<section class=\"one"), "{part}");
    let mut expected = before.clone();
    expected.extend(low.accept_all.iter().cloned());
    assert_eq!(
        text_sidecar_tags(&sidecar),
        expected,
        "the sidecar gained exactly the counted tags"
    );
    let marked = tagweave_collection::sidecar::read_sidecar(
        &sidecar,
        tagweave_collection::SidecarKind::Text,
    )
    .unwrap()
    .accepted;
    let counted: Vec<String> = low
        .accept_all
        .iter()
        .filter_map(|t| tagweave_collection::normalize_tag(t))
        .collect();
    assert_eq!(
        marked, counted,
        "marked in the sidecar as accepted suggestions"
    );
    let now = attr_values(&part, "class=\"current\"", "data-tag");
    for tag in &low.accept_all {
        assert!(now.contains(tag), "{tag} shown as carried: {now:?}");
    }
    assert!(attr_values(&part, "class=\"suggestion\"", "data-tag")
        .iter()
        .all(|t| !low.accept_all.contains(t)));
    // Rejecting answers in place too (no redirect, nothing written).
    let after = place(&served, &format!("/one-by-one/part?at={at}"));
    if let Some(tag) = after.suggested.first() {
        let answer = served.post(
            &format!("/picture/{}/set-aside", chosen.id),
            &format!(
                "token={token}&back=one-by-one&at={at}&answer=part&tag={}",
                form_value(tag)
            ),
        );
        assert_eq!(answer.status, 200, "{}", answer.text());
        assert!(!attr_values(&answer.text(), "class=\"suggestion\"", "data-tag").contains(tag));
        assert_eq!(text_sidecar_tags(&sidecar), expected);
    }
    // Without the script the same forms lead back to the walk at the same place.
    let plain = served.post(
        &format!("/picture/{}/set-aside", chosen.id),
        &format!("token={token}&back=one-by-one&at={at}&tag=anything"),
    );
    assert_eq!(plain.status, 303);
    assert_eq!(
        plain.header("Location"),
        Some(format!("/one-by-one?at={at}").as_str())
    );
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

/// What a client can tell an answer by: its status and its body.
fn comparable(answer: &Answer) -> (u16, String) {
    (answer.status, answer.text())
}

#[test]
fn nothing_is_answered_without_this_runs_pass() {
    let folder = trained_copy();
    let root = folder.path();
    let mut served = Served::start_unopened(root, &[]);
    let known = served.id_of("1950s/saltmarrow-0001.png");
    let root_text = root.display().to_string();
    let targets = [
        "/".to_string(),
        "/?q=night".to_string(),
        "/review".to_string(),
        "/style.css".to_string(),
        format!("/picture/{known}"),
        format!("/picture/{known}/thumbnail"),
        format!("/picture/{known}/large"),
        "/picture/0123456789abcdef/thumbnail".to_string(),
        "/nothing-here".to_string(),
    ];
    let wrong_pass = format!("tagweave-pass={}", "0".repeat(32));
    for target in &targets {
        for headers in [
            &[][..],
            &[("Cookie", wrong_pass.as_str())][..],
            &[("Cookie", "tagweave-pass=")][..],
        ] {
            let answer = served.send("GET", target, headers, b"");
            assert_eq!(
                answer.status,
                403,
                "{target} {headers:?}: {}",
                answer.text()
            );
            let text = answer.text();
            assert!(token_in(&text).is_none(), "{target}");
            assert!(!text.contains(&root_text), "{target} names the folder");
            assert!(!text.contains("saltmarrow"), "{target}");
        }
    }
    // A known and an unknown picture get the same refusal: nothing to tell them apart.
    assert_eq!(
        comparable(&served.get(&format!("/picture/{known}/thumbnail"))),
        comparable(&served.get("/picture/0123456789abcdef/thumbnail"))
    );
    // Nor can a change get in.
    let before = sidecar_snapshot(root);
    let origin = served.origin();
    let answer = served.post_with(
        &format!("/picture/{known}/tags"),
        &format!("token={}&add=rain", "a".repeat(32)),
        &[("Origin", &origin)],
    );
    assert_eq!(answer.status, 403);
    assert_eq!(sidecar_snapshot(root), before);

    // The printed address: a HEAD (a link preview) does not spend it, a wrong key is
    // refused, the first GET hands out the pass.
    let entry = served.entry_url.trim_start_matches(&served.url).to_string();
    assert!(entry.starts_with("open/"), "{entry}");
    assert_eq!(
        served.send("HEAD", &format!("/{entry}"), &[], b"").status,
        405
    );
    let wrong = format!("/open/{}", "f".repeat(32));
    assert_eq!(served.get(&wrong).status, 403);
    let opened = served.get(&format!("/{entry}"));
    assert_eq!(opened.status, 303, "{}", opened.text());
    assert_eq!(opened.header("Location"), Some("/"));
    let cookie = opened.header("Set-Cookie").expect("the pass").to_string();
    // source: RFC 6265 §4.1.2.6 (HttpOnly) and RFC 6265bis §4.1.2.7 (SameSite=Strict).
    let attributes: Vec<&str> = cookie.split(';').map(str::trim).collect();
    assert!(attributes[0].starts_with("tagweave-pass="), "{cookie}");
    assert_eq!(attributes[0].len(), "tagweave-pass=".len() + 32);
    for wanted in ["HttpOnly", "SameSite=Strict", "Path=/"] {
        assert!(attributes.contains(&wanted), "{wanted} missing: {cookie}");
    }
    // Spent: the same address lets no one else in; the browser that has the pass is
    // only sent on.
    let again = served.get(&format!("/{entry}"));
    assert_eq!(again.status, 403, "{}", again.text());
    assert!(again.header("Set-Cookie").is_none());
    served.pass = Some(attributes[0].to_string());
    let mine = served.get(&format!("/{entry}"));
    assert_eq!(mine.status, 303);
    assert!(mine.header("Set-Cookie").is_none());
    // With the pass, everything answers, even beside a cookie of the same name that a
    // server on another port of this machine set (cookies do not tell ports apart).
    assert_page(&served.get("/"), 200);
    let tossed = format!("tagweave-pass={}; {}", "1".repeat(32), attributes[0]);
    assert_page(
        &request(served.port, "GET", "/", &[("Cookie", &tossed)], b""),
        200,
    );
    assert_eq!(
        served.get(&format!("/picture/{known}/thumbnail")).status,
        200
    );
    assert_eq!(served.get("/style.css").status, 200);
    // The printed text says how the address works.
    assert!(served.entry_url.starts_with("http://127.0.0.1:"));
}

#[test]
fn other_sites_learn_nothing_about_which_pictures_exist() {
    let folder = trained_copy();
    let served = Served::start(folder.path(), &[]);
    let picture = "1950s/saltmarrow-0001.png";
    let id = served.id_of(picture);
    // Page ids are keyed: the plain hash of the path, which anyone can compute, is not
    // an address.
    assert_ne!(id, item_id_of(picture));
    assert_page(
        &served.get(&format!("/picture/{}", item_id_of(picture))),
        404,
    );
    assert_eq!(
        served
            .get(&format!("/picture/{}/thumbnail", item_id_of(picture)))
            .status,
        404
    );
    let grid = served.get("/?q=night").text();
    let ids = attr_values(&grid, "class=\"card\"", "data-id");
    let pictures = attr_values(&grid, "/thumbnail\"", "alt");
    assert!(!ids.is_empty());
    for (id, picture) in ids.iter().zip(&pictures) {
        assert_eq!(*id, served.id_of(picture));
    }
    // Every answer says no other site may use it.
    // source: Fetch Standard, Cross-Origin-Resource-Policy header, "same-origin".
    for target in [
        "/".to_string(),
        "/style.css".to_string(),
        format!("/picture/{id}/thumbnail"),
        "/picture/0123456789abcdef/thumbnail".to_string(),
        "/nothing".to_string(),
    ] {
        let answer = served.get(&target);
        assert_eq!(
            answer.header("Cross-Origin-Resource-Policy"),
            Some("same-origin"),
            "{target}"
        );
    }
    let refused = request(served.port, "GET", "/", &[], b"");
    assert_eq!(refused.status, 403);
    assert_eq!(
        refused.header("Cross-Origin-Resource-Policy"),
        Some("same-origin")
    );
    // Requests another site (or another port here) started are refused, pass or not,
    // and a known picture looks exactly like an unknown one.
    // source: Fetch Metadata Request Headers (W3C), Sec-Fetch-Site.
    for site in ["cross-site", "same-site"] {
        let headers = [("Sec-Fetch-Site", site), ("Sec-Fetch-Dest", "image")];
        let known = served.send("GET", &format!("/picture/{id}/thumbnail"), &headers, b"");
        let unknown = served.send("GET", "/picture/0123456789abcdef/thumbnail", &headers, b"");
        assert_eq!(known.status, 403, "{site}");
        assert_eq!(comparable(&known), comparable(&unknown), "{site}");
        assert_eq!(known.content_type(), "text/html; charset=utf-8");
    }
    // Our own pages' requests and typed addresses still work.
    for site in ["same-origin", "none"] {
        let answer = served.send(
            "GET",
            &format!("/picture/{id}/thumbnail"),
            &[("Sec-Fetch-Site", site)],
            b"",
        );
        assert_eq!(answer.status, 200, "{site}");
    }
}

#[test]
fn changes_must_be_forms_that_say_they_come_from_this_server() {
    let folder = trained_copy();
    let root = folder.path();
    let served = Served::start(root, &[]);
    let picture = "1950s/saltmarrow-0001.png";
    let id = served.id_of(picture);
    let token = served.token(&id);
    let target = format!("/picture/{id}/tags");
    let form = format!("token={token}&add=rain");
    let origin = served.origin();
    let foreign_page = "http://attacker.example/page.html".to_string();
    let own_page = format!("{origin}/picture/{id}");
    let before = sidecar_snapshot(root);
    let cookie = served.pass.clone().unwrap();
    let attempts: Vec<(&str, Vec<(&str, &str)>)> = vec![
        // source: HTML Living Standard — a form with enctype="text/plain" posts this type
        // without a CORS preflight, so another page could send it.
        (
            "text/plain",
            vec![("Content-Type", "text/plain"), ("Origin", &origin)],
        ),
        (
            "multipart",
            vec![
                ("Content-Type", "multipart/form-data; boundary=x"),
                ("Origin", &origin),
            ],
        ),
        ("no type", vec![("Origin", &origin)]),
        (
            "foreign Referer, no Origin",
            vec![
                ("Content-Type", "application/x-www-form-urlencoded"),
                ("Referer", &foreign_page),
            ],
        ),
        (
            "neither Origin nor Referer",
            vec![("Content-Type", "application/x-www-form-urlencoded")],
        ),
        (
            "Origin null",
            vec![
                ("Content-Type", "application/x-www-form-urlencoded"),
                ("Origin", "null"),
                ("Referer", &own_page),
            ],
        ),
    ];
    for (what, headers) in &attempts {
        let mut all = vec![("Cookie", cookie.as_str())];
        all.extend_from_slice(headers);
        let answer = request(served.port, "POST", &target, &all, form.as_bytes());
        let is_form = headers.iter().any(|(n, v)| {
            *n == "Content-Type" && v.starts_with("application/x-www-form-urlencoded")
        });
        // source: RFC 9110 §15.5.16 (415 for a body of a type not taken), §15.5.4 (403).
        let expected = if is_form { 403 } else { 415 };
        assert_eq!(answer.status, expected, "{what}: {}", answer.text());
    }
    assert_eq!(sidecar_snapshot(root), before, "nothing written");
    // Our own page's form: the form type, and its address as Referer (no Origin) is
    // enough; with Origin it is the Origin that counts.
    let answer = served.post_with(&target, &form, &[("Referer", &own_page)]);
    assert_page(&answer, 200);
    assert!(text_sidecar_tags(&text_sidecar_of(root, picture)).contains(&"rain".to_string()));
    let answer = served.post_with(
        &target,
        &format!("token={token}&add=fog"),
        &[
            ("Origin", &origin),
            (
                "Content-Type",
                "application/x-www-form-urlencoded; charset=UTF-8",
            ),
        ],
    );
    assert_eq!(answer.status, 200, "{}", answer.text());
}

#[test]
fn tags_that_would_show_as_something_else_are_refused() {
    let folder = trained_copy();
    let root = folder.path();
    let served = Served::start(root, &[]);
    let picture = "1950s/saltmarrow-0001.png";
    let id = served.id_of(picture);
    let token = served.token(&id);
    let before = sidecar_snapshot(root);
    // source: Unicode UAX #9 Table 1 (bidirectional controls) and §23.7 noncharacters;
    // U+202E makes "gpj.exe" show as "exe.jpg".
    for tag in [
        "gpj.exe\u{202E}",
        "\u{202E}gpj.exe",
        "a\u{202A}b",
        "a\u{2066}b\u{2069}",
        "left\u{200E}",
        "right\u{200F}",
        "a\u{FFFF}",
        "a\u{FFFE}",
        "a\u{FDD0}",
        "a\u{10FFFF}",
    ] {
        for route in ["tags", "set-aside"] {
            let field = if route == "tags" { "add" } else { "tag" };
            let answer = served.post(
                &format!("/picture/{id}/{route}"),
                &format!("token={token}&{field}={}", form_value(tag)),
            );
            assert_eq!(answer.status, 400, "{route} {tag:?}: {}", answer.text());
            assert!(answer.text().contains("U+"), "{}", answer.text());
            assert!(!answer.text().contains('\u{202E}'));
        }
    }
    assert_eq!(sidecar_snapshot(root), before, "nothing written");
    // An ordinary tag with letters from other scripts is fine.
    let answer = served.post(
        &format!("/picture/{id}/tags"),
        &format!("token={token}&add={}", form_value("שלום-café")),
    );
    assert_eq!(answer.status, 200, "{}", answer.text());
}

#[test]
fn a_sidecar_replaced_by_a_link_is_refused_by_name() {
    let folder = trained_copy();
    let root = folder.path();
    let truth = truth();
    // source: TRUTH.csv — a picture with a text sidecar.
    let row = truth
        .values()
        .find(|r| r.sidecar == "txt" && r.file != ODD_PICTURE)
        .unwrap();
    let sidecar = text_sidecar_of(root, &row.file);
    let elsewhere = tempfile::tempdir().unwrap();
    let outside = elsewhere.path().join("moved.txt");
    std::fs::rename(&sidecar, &outside).unwrap();
    std::os::unix::fs::symlink(&outside, &sidecar).unwrap();
    let outside_bytes = std::fs::read(&outside).unwrap();
    let before = sidecar_snapshot(root);
    let listing = |dir: &std::path::Path| {
        let mut names: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    };
    let folder_of = root.join(&row.file).parent().unwrap().to_path_buf();
    let files_before = listing(&folder_of);

    let served = Served::start(root, &[]);
    let id = served.id_of(&row.file);
    let token = served.token(&id);
    let answer = served.post(
        &format!("/picture/{id}/tags"),
        &format!("token={token}&add=zeppelin-sky"),
    );
    assert_eq!(answer.status, 409, "{}", answer.text());
    let name = sidecar.file_name().unwrap().to_string_lossy().into_owned();
    assert!(
        answer.text().contains(&name),
        "names the link: {}",
        answer.text()
    );
    assert!(answer.text().contains("symbolic link"), "{}", answer.text());
    assert_eq!(listing(&folder_of), files_before, "no second sidecar");
    assert_eq!(std::fs::read(&outside).unwrap(), outside_bytes);
    assert_eq!(sidecar_snapshot(root), before);
    // Removing is refused alike.
    let tag = &row.written_tags[0];
    let answer = served.post(
        &format!("/picture/{id}/tags"),
        &format!("token={token}&remove={}", form_value(tag)),
    );
    assert_eq!(answer.status, 409, "{}", answer.text());
    assert_eq!(std::fs::read(&outside).unwrap(), outside_bytes);
}

/// The server's resident memory (kB), from /proc.
fn resident_kb(pid: u32) -> Option<u64> {
    std::fs::read_to_string(format!("/proc/{pid}/status"))
        .ok()?
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))?
        .split_whitespace()
        .next()?
        .parse()
        .ok()
}

#[test]
fn slow_clients_lock_no_one_out() {
    use std::io::Write;
    use std::net::TcpStream;
    use std::time::{Duration, Instant};

    let folder = trained_copy();
    let served = Served::start(folder.path(), &[]);
    let pass = served.pass.clone().unwrap();
    let normal_get = || {
        request_within(
            served.port,
            "GET",
            "/style.css",
            &[("Cookie", &pass)],
            b"",
            Duration::from_secs(1),
        )
    };
    assert_eq!(normal_get().unwrap().status, 200);

    // 40 connections each sending one byte of a request head every second, for up to
    // 8 s (bounded), as the attack sent one every 5 s.
    let slow: Vec<TcpStream> = (0..40)
        .map(|_| {
            let mut s = TcpStream::connect(("127.0.0.1", served.port)).unwrap();
            s.write_all(b"G").unwrap();
            s
        })
        .collect();
    let started = Instant::now();
    let head = b"ET / HTTP/1.1\r\nX-Slow: aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa";
    let mut answered = 0;
    let mut closed_at: Vec<Option<Duration>> = vec![None; slow.len()];
    let mut slow = slow;
    for tick in 0..8 {
        for (i, s) in slow.iter_mut().enumerate() {
            if closed_at[i].is_none() && s.write_all(&head[tick..tick + 1]).is_err() {
                closed_at[i] = Some(started.elapsed());
            }
        }
        // A normal GET meanwhile, answered within 1 s.
        let answer = normal_get().unwrap_or_else(|e| {
            panic!("no answer within 1 s with 40 slow connections held ({tick} s in): {e}")
        });
        assert_eq!(answer.status, 200, "{}", answer.text());
        answered += 1;
        std::thread::sleep(Duration::from_millis(1000));
    }
    assert_eq!(answered, 8);
    // Every slow connection was let go: no answer but an end (or a 408) by now, 8 s after
    // it connected — past the 5 s the whole request may take.
    for (i, s) in slow.iter_mut().enumerate() {
        s.set_read_timeout(Some(Duration::from_secs(2))).unwrap();
        let mut rest = Vec::new();
        let ended = std::io::Read::read_to_end(s, &mut rest);
        let text = String::from_utf8_lossy(&rest);
        assert!(
            ended.is_ok()
                || closed_at[i].is_some()
                || ended
                    .as_ref()
                    .is_err_and(|e| e.kind() == std::io::ErrorKind::ConnectionReset),
            "slow connection {i} still held: {ended:?}"
        );
        assert!(
            rest.is_empty()
                || text.starts_with("HTTP/1.1 408 ")
                || text.starts_with("HTTP/1.1 400 "),
            "{text}"
        );
    }

    // 40 searches, 8 at a time, all answered; then 2 × 1,000 requests, 8 at a time, all
    // answered with the server's memory flat: pictures' thumbnails and the style sheet
    // (searches are left out of the memory check: each costs a few hundred ms here, and
    // the allocator keeps some of what they used, the same with any HTTP layer).
    let pid = served.pid();
    let ids: Vec<String> = ["1950s/saltmarrow-0001.png", "1950s/saltmarrow-0003.jpg"]
        .iter()
        .map(|p| served.id_of(p))
        .collect();
    let queries = ["night", "harbour", "night+harbour", "snow", "day"];
    let run = |n: usize, searches: bool| {
        std::thread::scope(|scope| {
            for worker in 0..8 {
                let (pass, ids) = (&pass, &ids);
                scope.spawn(move || {
                    for i in (worker..n).step_by(8) {
                        let target = match i % 4 {
                            _ if searches => format!("/?q={}", queries[i % queries.len()]),
                            0 | 2 => "/style.css".to_string(),
                            k => format!("/picture/{}/thumbnail", ids[k / 2]),
                        };
                        let answer = request(served.port, "GET", &target, &[("Cookie", pass)], b"");
                        assert_eq!(answer.status, 200, "{target}");
                    }
                });
            }
        })
    };
    run(40, true);
    run(1000, false);
    let first = resident_kb(pid);
    run(1000, false);
    let second = resident_kb(pid);
    if let (Some(first), Some(second)) = (first, second) {
        // Flat: the second thousand adds less than 8 kB a request.
        assert!(second < first + 8 * 1000, "{first} kB → {second} kB");
        eprintln!("server memory after 1,000 requests {first} kB, after 2,000 {second} kB");
    }
}

// While the page is open, commands from another terminal work; a decision written through
// the page while one of them runs waits for it, and the next command sees the new tag
// without a scan.
#[test]
fn commands_work_beside_the_page_and_see_what_it_writes() {
    let folder = trained_copy();
    let root = folder.path();
    let truth = truth();
    let row = missing_a_true_tag(&truth);
    let tag = row.removed_tags[0].clone();
    let served = Served::start(root, &[]);

    // How many pictures carry the tag, and whether this one does, as commands read it.
    let carrying = |root: &std::path::Path| -> (u64, bool) {
        let out = tagweave(root, &["tags", "--json"]);
        assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
        let count = json(&out)["tags"]
            .as_array()
            .unwrap()
            .iter()
            .find(|t| t["tag"] == tag.as_str())
            .map_or(0, |t| t["pictures"].as_u64().unwrap());
        let out = tagweave(root, &["suggest", &row.file, "--json"]);
        assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
        let answer = json(&out);
        let carried = answer["pictures"][0]["carried"]
            .as_array()
            .unwrap_or_else(|| panic!("{answer}"))
            .iter()
            .any(|t| t == tag.as_str());
        (count, carried)
    };
    let (before, carried) = carrying(root);
    assert!(!carried, "{} does not carry {tag} yet", row.file);

    // A command holds the store; the page's write waits for it to finish.
    let mut query = std::process::Command::new(env!("CARGO_BIN_EXE_tagweave"))
        .args(["to-tag", "--json", "--sheet", "to-tag.csv"])
        .current_dir(root)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let lock = root.join(".tagweave/lock");
    let started = std::time::Instant::now();
    while std::fs::read_to_string(&lock).ok().as_deref() != Some(&query.id().to_string()) {
        if query.try_wait().unwrap().is_some() {
            break; // done before it was seen: the write below simply does not wait
        }
        assert!(started.elapsed().as_secs() < 30, "no lock taken");
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    let id = served.id_of(&row.file);
    let token = served.token(&id);
    let answer = served.post(
        &format!("/picture/{id}/tags"),
        &format!("token={token}&from=suggestion&add={}", form_value(&tag)),
    );
    let page = assert_page(&answer, 200);
    assert!(
        page.contains("tagweave commands in another terminal see the new tags now"),
        "{page}"
    );
    assert!(query.wait().unwrap().success(), "the query finished");

    // The next command sees the tag, as carried, without a scan.
    assert_eq!(
        carrying(root),
        (before + 1, true),
        "{} carries {tag} now",
        row.file
    );
}
