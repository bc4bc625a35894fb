//! `tagweave scan` and `tagweave tags` run as a user would run them, on real folders.

mod common;

use std::collections::BTreeSet;
use std::time::{Duration, SystemTime};

use common::*;

fn demo_copy() -> (tempfile::TempDir, std::path::PathBuf) {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path().join("archive");
    copy_tree(&repo_root().join("demo-collection"), &folder);
    (temp, folder)
}

#[test]
fn scanning_the_demo_archive_counts_what_truth_csv_says() {
    let (_temp, folder) = demo_copy();
    let truth = demo_truth();
    let out = tagweave(&folder, &["scan", ".", "--json"]);
    let report = json(&out);
    let expected_untagged = truth.iter().filter(|r| r.written_tags.is_empty()).count();
    let distinct: BTreeSet<&String> = truth.iter().flat_map(|r| &r.written_tags).collect();
    assert_eq!(report["items"], truth.len(), "{report}");
    assert_eq!(report["untagged"], expected_untagged, "{report}");
    assert_eq!(
        report["tagged"],
        truth.len() - expected_untagged,
        "{report}"
    );
    assert_eq!(report["tags"], distinct.len(), "{report}");
    assert_eq!(report["added"], truth.len(), "{report}");
    assert!(
        truth.iter().any(|r| r.sidecar == "xmp") && truth.iter().any(|r| r.sidecar == "none"),
        "the demo archive exercises XMP sidecars and untagged pictures"
    );
    assert_eq!(out.status.code(), Some(0), "{report}");

    // Every picture carries exactly the tags its sidecar holds (text and XMP alike).
    let store = tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
    let indexed: std::collections::HashMap<String, BTreeSet<String>> = store
        .items()
        .unwrap()
        .into_iter()
        .map(|item| (item.rel_path, item.tags.into_iter().collect()))
        .collect();
    drop(store);
    for row in &truth {
        let expected: BTreeSet<String> = row.written_tags.iter().cloned().collect();
        assert_eq!(
            indexed.get(&row.file),
            Some(&expected),
            "{} ({})",
            row.file,
            row.sidecar
        );
    }

    // The tag list agrees with the truth file's written tags.
    let tags = json(&tagweave(&folder, &["tags", "--json"]));
    let top = &tags["tags"][0];
    let top_count = truth
        .iter()
        .filter(|r| r.written_tags.iter().any(|t| top["tag"] == t.as_str()))
        .count();
    assert_eq!(top["pictures"], top_count, "{tags}");
}

#[test]
fn a_second_scan_reads_only_what_changed() {
    let (_temp, folder) = demo_copy();
    let truth = demo_truth();
    let first = json(&tagweave(&folder, &["scan", ".", "--json"]));
    assert_eq!(first["added"], truth.len());

    let with_text = truth.iter().find(|r| r.sidecar == "txt").unwrap();
    let stem = with_text.file.rsplit_once('.').unwrap().0;
    let sidecar = folder.join(format!("{stem}.txt"));
    let mut text = std::fs::read_to_string(&sidecar).unwrap();
    text.push_str("\nfreshly-added-tag\n");
    std::fs::write(&sidecar, text).unwrap();

    let touched = truth.iter().rev().find(|r| r.sidecar == "none").unwrap();
    let picture = std::fs::File::options()
        .write(true)
        .open(folder.join(&touched.file))
        .unwrap();
    picture
        .set_modified(SystemTime::now() + Duration::from_secs(5))
        .unwrap();

    let deleted = &truth[truth.len() / 2];
    std::fs::remove_file(folder.join(&deleted.file)).unwrap();

    let second = json(&tagweave(&folder, &["scan", ".", "--json"]));
    assert_eq!(second["refreshed"], 2, "{second}");
    assert_eq!(second["removed"], 1, "{second}");
    assert_eq!(second["added"], 0, "{second}");
    assert_eq!(second["unchanged"], truth.len() - 3, "{second}");
    assert_eq!(second["items"], truth.len() - 1, "{second}");
    let tags = json(&tagweave(&folder, &["tags", "--json"]));
    assert!(tags["tags"]
        .as_array()
        .unwrap()
        .iter()
        .any(|t| t["tag"] == "freshly-added-tag" && t["pictures"] == 1));
}

#[test]
fn a_store_held_by_another_process_is_refused_with_a_clear_message() {
    let (_temp, folder) = demo_copy();
    let _held = tagweave_store::Store::open_or_create(&folder.join(".tagweave"), &folder).unwrap();
    let out = tagweave(&folder, &["scan", "."]);
    assert_eq!(out.status.code(), Some(1));
    let message = String::from_utf8_lossy(&out.stderr);
    assert!(
        message.contains("in use") && message.contains(&std::process::id().to_string()),
        "{message}"
    );
}

#[test]
fn commands_outside_any_collection_say_how_to_start() {
    let temp = tempfile::tempdir().unwrap();
    let out = tagweave(temp.path(), &["tags"]);
    assert_eq!(out.status.code(), Some(1));
    let message = String::from_utf8_lossy(&out.stderr);
    assert!(message.contains("tagweave scan"), "{message}");
    // Under --json the error is one JSON object on standard output too.
    let out = tagweave(temp.path(), &["tags", "--json"]);
    assert_eq!(out.status.code(), Some(1));
    let error = json(&out);
    assert!(
        error["error"].as_str().unwrap().contains("tagweave scan"),
        "{error}"
    );
    assert_eq!(error.as_object().unwrap().len(), 1, "{error}");
}

// The collection folder stands for the store inside it: `--store FOLDER`, `tags FOLDER`,
// and a scan given the folder as its store never makes a store among the pictures.
#[test]
fn the_collection_folder_stands_for_its_store() {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path().join("photos");
    std::fs::create_dir_all(&folder).unwrap();
    for (i, picture) in demo_jpegs(4).iter().enumerate() {
        std::fs::copy(picture, folder.join(format!("p{i}.jpg"))).unwrap();
    }
    std::fs::write(folder.join("p0.txt"), "harbour\nnight\n").unwrap();
    let name = folder.to_str().unwrap();
    let scan = tagweave(temp.path(), &["scan", name, "--store", name, "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));
    assert!(folder.join(".tagweave/db").exists());
    assert!(!folder.join("db").exists(), "no store among the pictures");
    let by_store = tagweave(temp.path(), &["tags", "--store", name, "--json"]);
    assert_eq!(by_store.status.code(), Some(0), "{}", stderr_of(&by_store));
    let by_folder = tagweave(temp.path(), &["tags", name, "--json"]);
    assert_eq!(json(&by_folder), json(&by_store));
    assert_eq!(json(&by_store)["distinct"], 2);
    let store = folder.join(".tagweave");
    let by_store_dir = tagweave(
        temp.path(),
        &["tags", "--store", store.to_str().unwrap(), "--json"],
    );
    assert_eq!(json(&by_store_dir), json(&by_store));
}

#[test]
fn scanning_the_shared_evaluation_sets_counts_every_picture() {
    // source: ../shared/eval/*/STATS.md (749 emoji pictures, 316 stamp pictures, all tagged)
    for (name, pictures, distinct) in [("emoji-twemoji", 749, 2088), ("tuxpaint-stamps", 316, 503)]
    {
        let Some(shared) = shared_eval(name) else {
            continue;
        };
        let temp = tempfile::tempdir().unwrap();
        copy_tree(&shared, temp.path());
        let report = json(&tagweave(temp.path(), &["scan", ".", "--json"]));
        assert_eq!(report["items"], pictures, "{name}: {report}");
        assert_eq!(report["tagged"], pictures, "{name}: {report}");
        assert_eq!(report["tags"], distinct, "{name}: {report}");
    }
}

/// The first `n` JPEG pictures of the demo archive, by TRUTH.csv order.
fn demo_jpegs(n: usize) -> Vec<std::path::PathBuf> {
    let demo = repo_root().join("demo-collection");
    demo_truth()
        .iter()
        .filter(|r| r.file.ends_with(".jpg"))
        .take(n)
        .map(|r| demo.join(&r.file))
        .collect()
}

#[test]
fn bad_files_are_named_counted_and_passed_over() {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path();
    let jpegs = demo_jpegs(6);
    for (i, jpeg) in jpegs.iter().enumerate() {
        std::fs::copy(jpeg, folder.join(format!("good-{i}.jpg"))).unwrap();
        std::fs::write(folder.join(format!("good-{i}.txt")), "harbour\n").unwrap();
    }
    let whole = std::fs::read(&jpegs[0]).unwrap();
    std::fs::write(folder.join("cut-short.jpg"), &whole[..whole.len() / 3]).unwrap();
    std::fs::write(folder.join("empty.jpg"), b"").unwrap();
    std::fs::write(folder.join("letter.jpg"), b"Dear keeper of the archive,\n").unwrap();
    std::fs::copy(&jpegs[1], folder.join("latin1.jpg")).unwrap();
    std::fs::write(folder.join("latin1.txt"), b"caf\xe9\n").unwrap();
    std::fs::write(folder.join("lonely.txt"), "night\n").unwrap();
    std::fs::write(folder.join("notes.md"), "about this folder\n").unwrap();

    let out = tagweave(folder, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(3), "3 = done with skipped files");
    let report = json(&out);
    assert_eq!(report["items"], 6, "{report}");
    assert_eq!(report["other_files"], 1, "{report}");
    let skipped = &report["skipped"];
    assert_eq!(skipped["empty file"], 1, "{report}");
    assert_eq!(skipped["not an image"], 1, "{report}");
    assert_eq!(skipped["bad sidecar"], 1, "{report}");
    assert_eq!(skipped["sidecar without picture"], 1, "{report}");
    assert_eq!(skipped["damaged picture"], 1, "{report}");

    // The same files, listed one by one for scripts, with the reason words of the counts.
    let listed: Vec<(&str, &str, Option<&str>)> = report["skipped_files"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            (
                e["path"].as_str().unwrap(),
                e["reason"].as_str().unwrap(),
                e.get("sidecar").map(|s| s.as_str().unwrap()),
            )
        })
        .collect();
    assert_eq!(
        listed,
        [
            ("cut-short.jpg", "damaged picture", None),
            ("empty.jpg", "empty file", None),
            ("latin1.jpg", "bad sidecar", Some("latin1.txt")),
            ("letter.jpg", "not an image", None),
            ("lonely.txt", "sidecar without picture", None),
        ],
        "{report}"
    );

    let table = tagweave(folder, &["scan", ".", "--verbose"]);
    let text = String::from_utf8_lossy(&table.stdout);
    for name in [
        "cut-short.jpg",
        "empty.jpg",
        "letter.jpg",
        "latin1.txt",
        "lonely.txt",
    ] {
        assert!(
            text.contains(name),
            "{name} is named in the summary:\n{text}"
        );
    }
}

// source: crates/collection/testdata/raw (make_fixtures.py there): a DNG written by
// tifffile 2026.3.3 and CR2, ORF and RW2 files laid out byte by byte, each holding a
// 160x120 JPEG preview made by Pillow 13.0.0; ExifTool 12.57 reads each as its format.
#[test]
fn camera_raw_pictures_are_described_through_their_previews() {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path();
    for (i, jpeg) in demo_jpegs(4).iter().enumerate() {
        std::fs::copy(jpeg, folder.join(format!("good-{i}.jpg"))).unwrap();
    }
    let raw = repo_root().join("crates/collection/testdata/raw");
    for (fixture, name) in [
        ("preview.dng", "reef.dng"),
        ("preview.cr2", "real.CR2"),
        ("preview.orf", "shot.ORF"),
        ("preview.rw2", "shot.RW2"),
    ] {
        std::fs::copy(raw.join(fixture), folder.join(name)).unwrap();
    }
    std::fs::write(folder.join("real.txt"), "harbour\n").unwrap();
    std::fs::write(folder.join("shot.RW2.xmp"), RW2_XMP).unwrap();

    let out = tagweave(folder, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["items"], 8, "{report}");
    assert_eq!(report["features"]["encoded"], 8, "{report}");
    assert_eq!(report["other_files"], 0, "{report}");
    assert_eq!(report["skipped_files"].as_array().map(Vec::len), Some(0));

    let tags = indexed_tags(folder);
    assert_eq!(tags["real.CR2"], ["harbour"]);
    assert_eq!(tags["reef.dng"], ["tide-pool"]);
    assert_eq!(tags["shot.RW2"], ["quay"]);
    assert!(tags["shot.ORF"].is_empty());
    let store = tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
    let dimension = report["features"]["dimension"].as_u64().unwrap() as usize;
    for item in store.items().unwrap() {
        let features = store
            .vector(tagweave_store::FEATURES, &item.id)
            .unwrap()
            .unwrap_or_else(|| panic!("{} has features", item.rel_path));
        assert_eq!(features.len(), dimension, "{}", item.rel_path);
        assert!(features.iter().all(|x| x.is_finite()), "{}", item.rel_path);
        assert!(features.iter().any(|&x| x != 0.0), "{}", item.rel_path);
    }
}

const RW2_XMP: &str = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
 xmlns:dc="http://purl.org/dc/elements/1.1/"><rdf:Description><dc:subject><rdf:Bag>
 <rdf:li>quay</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"#;

#[test]
fn json_lists_skipped_files_relative_to_the_folder() {
    let temp = tempfile::tempdir().unwrap();
    let folder = temp.path();
    let jpegs = demo_jpegs(4);
    for (i, jpeg) in jpegs.iter().enumerate() {
        std::fs::copy(jpeg, folder.join(format!("good-{i}.jpg"))).unwrap();
    }
    let trip = folder.join("trip 2024");
    std::fs::create_dir(&trip).unwrap();
    let whole = std::fs::read(&jpegs[0]).unwrap();
    std::fs::write(trip.join("cut-short.jpg"), &whole[..whole.len() / 3]).unwrap();
    std::fs::copy(&jpegs[1], trip.join("pier.jpg")).unwrap();
    std::fs::write(
        trip.join("pier.xmp"),
        "<rdf:RDF xmlns:rdf=\"http://www.w3.org/1999/02/22-rdf-syntax-ns#\"><rdf:li>x</rdf:Bag>",
    )
    .unwrap();
    #[cfg(unix)]
    {
        use std::os::unix::ffi::OsStrExt;
        let name = std::ffi::OsStr::from_bytes(b"caf\xe9.jpg");
        std::fs::copy(&jpegs[2], trip.join(name)).unwrap();
    }

    let out = tagweave(folder, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(3), "3 = done with skipped files");
    let report = json(&out);
    // The fields scripts already read are all still there, and one more.
    let keys: BTreeSet<&str> = report
        .as_object()
        .unwrap()
        .keys()
        .map(String::as_str)
        .collect();
    let expected_keys: BTreeSet<&str> = [
        "items",
        "tagged",
        "untagged",
        "tags",
        "accepted_suggestions",
        "tagged_only_by_suggestions",
        "added",
        "refreshed",
        "unchanged",
        "removed",
        "other_files",
        "skipped",
        "features",
        "coded",
        "seconds",
        "skipped_files",
    ]
    .into();
    assert_eq!(keys, expected_keys, "{report}");
    assert_eq!(report["items"], 4, "{report}");

    let mut expected = vec![
        serde_json::json!({"path": "trip 2024/cut-short.jpg", "reason": "damaged picture"}),
        serde_json::json!({"path": "trip 2024/pier.jpg", "reason": "bad sidecar",
                           "sidecar": "trip 2024/pier.xmp"}),
    ];
    if cfg!(unix) {
        // Not UTF-8: the invalid byte shows as U+FFFD REPLACEMENT CHARACTER.
        expected.insert(
            0,
            serde_json::json!({"path": "trip 2024/caf\u{fffd}.jpg", "reason": "bad file name"}),
        );
    }
    let listed = report["skipped_files"].as_array().unwrap();
    let without_messages: Vec<serde_json::Value> = listed
        .iter()
        .map(|e| {
            let mut e = e.clone();
            let message = e.as_object_mut().unwrap().remove("message");
            assert!(
                message.is_some_and(|m| m.as_str().is_some_and(|m| m.contains("skipped"))),
                "{e}"
            );
            e
        })
        .collect();
    assert_eq!(without_messages, expected, "{report}");
    assert!(
        listed[listed.len() - 1]["message"]
            .as_str()
            .unwrap()
            .contains("not well-formed"),
        "{report}"
    );
}

#[test]
fn the_same_folder_and_seed_give_identical_features() {
    let (_a, first) = demo_copy();
    let (_b, second) = demo_copy();
    for folder in [&first, &second] {
        let report = json(&tagweave(folder, &["scan", ".", "--json"]));
        assert_eq!(report["features"]["encoded"], 400, "{report}");
    }
    // A relearn with the same seed must reproduce the same extractor and vectors too.
    let again = json(&tagweave(&second, &["scan", ".", "--json", "--relearn"]));
    assert_eq!(again["features"]["learned"], true, "{again}");
    assert_eq!(again["unchanged"], 400, "{again}");

    let open =
        |folder: &std::path::Path| tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
    let (a, b) = (open(&first), open(&second));
    let items = a.items().unwrap();
    assert_eq!(items.len(), 400);
    for item in &items {
        let va = a.vector(tagweave_store::FEATURES, &item.id).unwrap();
        let vb = b.vector(tagweave_store::FEATURES, &item.id).unwrap();
        assert!(va.is_some(), "{} has features", item.rel_path);
        let bits =
            |v: Option<Vec<f32>>| v.map(|v| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>());
        assert_eq!(bits(va), bits(vb), "{}", item.rel_path);
    }
}

#[test]
fn the_demo_command_indexes_and_measures_the_archive() {
    let (_temp, folder) = demo_copy();
    let out = tagweave(&folder, &["demo", folder.to_str().unwrap()]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let truth = demo_truth();
    assert!(
        text.contains(&format!("pictures  {:>6}", truth.len())),
        "{text}"
    );
    // the jargon of training and measuring comes with a legend
    for expected in [
        "Step 1",
        "Step 2",
        "ridge",
        "known mislabels",
        "Words used above:",
        "reconstruction error  how far",
        "P@1, P@5",
        "N+            how many tags",
    ] {
        assert!(text.contains(expected), "{expected} missing:\n{text}");
    }
}

/// The tags of every indexed picture, by relative path.
fn indexed_tags(folder: &std::path::Path) -> std::collections::BTreeMap<String, Vec<String>> {
    let store = tagweave_store::Store::open(&folder.join(".tagweave")).unwrap();
    store
        .items()
        .unwrap()
        .into_iter()
        .map(|item| (item.rel_path, item.tags))
        .collect()
}

fn embedded_fixture(name: &str) -> Vec<u8> {
    std::fs::read(
        repo_root()
            .join("crates/collection/testdata/embedded")
            .join(name),
    )
    .unwrap()
}

// source: crates/collection/testdata/embedded/README.md — keywords written inside the
// pictures by Exempi 2.6.3 (python-xmp-toolkit 2.1.0) and by ExifTool 12.57.
#[test]
fn keywords_inside_pictures_are_tags_and_apply_never_writes_into_them() {
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    let harbour = embedded_fixture("xmp-exempi.jpg");
    put(root, "harbour.jpg", &harbour);
    put(
        root,
        "lighthouse.jpg",
        &embedded_fixture("iptc-exiftool.jpg"),
    );
    put(root, "boats.webp", &embedded_fixture("xmp-exiftool.webp"));
    put(root, "sea.png", &embedded_fixture("xmp-exempi.png"));
    put(root, "sea.txt", b"Sea\nharbour\n");
    put(root, "pier.tif", &embedded_fixture("xmp-exempi.tif"));

    // Once per picture, in the verbose listing of the scan that reads them.
    let first = tagweave(root, &["scan", ".", "--verbose"]);
    assert_eq!(first.status.code(), Some(0), "{}", stderr_of(&first));
    assert_eq!(
        stdout_of(&first)
            .matches("tags read from inside the picture")
            .count(),
        5,
        "{}",
        stdout_of(&first)
    );
    let report = json(&tagweave(root, &["scan", ".", "--json"]));
    assert_eq!(report["unchanged"], 5, "{report}");
    assert_eq!(report["items"], 5, "{report}");
    assert_eq!(report["tagged"], 5, "{report}");
    assert_eq!(report["untagged"], 0, "{report}");
    let tags = indexed_tags(root);
    let expected = [
        ("boats.webp", &["harbour", "night-boats"][..]),
        ("harbour.jpg", &["harbour", "night-boats", "naïve-art"][..]),
        ("lighthouse.jpg", &["lighthouse", "café-terrace", "fog"][..]),
        (
            "sea.png",
            &["sea", "harbour", "night-boats", "naïve-art"][..],
        ),
    ];
    for (file, want) in expected {
        assert_eq!(tags[file], want, "{file}");
    }

    // Accepting a tag writes a sidecar beside the picture; the picture keeps every byte.
    let sheet = "picture,tag,probability,kind,accept\nharbour.jpg,gulls,0.9,suggested,y\n";
    put(root, "review.csv", sheet.as_bytes());
    let out = tagweave(root, &["apply", "review.csv", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    assert_eq!(std::fs::read(root.join("harbour.jpg")).unwrap(), harbour);
    let written = std::fs::read_to_string(root.join("harbour.txt")).unwrap();
    assert!(
        written
            .lines()
            .any(|l| l.trim() == "gulls # accepted suggestion"),
        "{written}"
    );

    let rescan = json(&tagweave(root, &["scan", ".", "--json"]));
    assert_eq!(rescan["refreshed"], 1, "{rescan}");
    assert_eq!(
        indexed_tags(root)["harbour.jpg"],
        ["gulls", "harbour", "night-boats", "naïve-art"]
    );

    // Removing a keyword kept inside the picture changes nothing, and says so.
    let sheet =
        "picture,tag,probability,kind,accept\nharbour.jpg,night boats,0.1,disputed,remove\n";
    put(root, "remove.csv", sheet.as_bytes());
    let out = tagweave(root, &["apply", "remove.csv", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let said = json(&out);
    assert_eq!(said["not_in_sidecars"][0][1], "night-boats", "{said}");
    assert_eq!(said["tags_removed"], 0, "{said}");
    assert_eq!(std::fs::read(root.join("harbour.jpg")).unwrap(), harbour);
    let text = stdout_of(&tagweave(root, &["apply", "remove.csv"]));
    assert!(text.contains("never changes pictures"), "{text}");
}

/// A picture whose embedded metadata is damaged is still indexed (without those keywords),
/// and the scan says why; its sidecar's tags are read as usual.
#[test]
fn damaged_keywords_inside_a_picture_do_not_stop_the_scan() {
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    let mut bytes = embedded_fixture("iptc-exiftool.jpg");
    let at = bytes.windows(3).position(|w| w == b"\x1C\x02\x19").unwrap();
    bytes[at] = 0x1D; // the first keyword data set no longer starts with its tag marker
    put(root, "quay.jpg", &bytes);
    put(root, "quay.txt", b"quay\n");
    // Enough ordinary pictures for the scan to learn its features from.
    for (i, jpeg) in demo_jpegs(4).iter().enumerate() {
        std::fs::copy(jpeg, root.join(format!("demo-{i}.jpg"))).unwrap();
    }
    let out = tagweave(root, &["scan", ".", "--verbose"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let said = stdout_of(&out);
    assert!(
        said.contains("keywords inside the picture not read: its IPTC keywords"),
        "{said}"
    );
    assert_eq!(indexed_tags(root)["quay.jpg"], ["quay"]);
}
