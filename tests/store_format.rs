//! The store's format version: a store of another version is refused with the way out
//! (`--rebuild`), and a committed store of the current version still reads, so a change
//! that breaks reading old stores without bumping the version fails here.

mod common;
mod corpus;

use std::path::{Path, PathBuf};
use std::time::Instant;

use common::*;
use tagweave_store::FORMAT_VERSION;

/// The committed store of the current version.
const FIXTURE_VERSION: u32 = 3;
/// Committed stores of earlier versions, each to be refused with the way out.
const OLDER_FIXTURES: [u32; 2] = [1, 2];
/// `.gitignore` keeps every `.tagweave/` out of git, so the committed store sits under this
/// name and is put in place as `.tagweave` in each test's copy.
const FIXTURE_STORE: &str = "dot-tagweave";

fn fixture_dir() -> PathBuf {
    fixture_of(FIXTURE_VERSION)
}

fn fixture_of(version: u32) -> PathBuf {
    repo_root().join(format!("tests/fixtures/store-format-{version}"))
}

/// Three small pictures with text and XMP sidecars (deterministic bytes).
fn tiny_collection(root: &Path) {
    put(root, "harbour.png", &corpus::rgb_png(24, 16, 1));
    put(root, "harbour.txt", b"harbour\nboats\n");
    put(root, "lighthouse.jpg", &corpus::rgb_jpeg(16, 24, 2));
    put(
        root,
        "lighthouse.xmp",
        br#"<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"><rdf:Description xmlns:dc="http://purl.org/dc/elements/1.1/"><dc:subject><rdf:Bag><rdf:li>Lighthouse</rdf:li><rdf:li>night</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF></x:xmpmeta>"#,
    );
    put(root, "untagged/quay.png", &corpus::rgb_png(20, 20, 3));
}

/// Copies everything, the committed store folder included, which becomes `.tagweave`.
fn copy_all(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        let name = entry.file_name();
        let target = if name == FIXTURE_STORE {
            to.join(".tagweave")
        } else {
            to.join(name)
        };
        if entry.file_type().unwrap().is_dir() {
            copy_all(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), &target).unwrap();
        }
    }
}

/// Rewrites the store's `format_version` record behind tagweave's back, as an older or
/// newer tagweave would have left it: without the facts file this tagweave keeps of the
/// current format (older ones never wrote one; one of another format is not believed).
fn set_format_version(store_dir: &Path, version: u32) {
    let db = sled::open(store_dir.join("db")).unwrap();
    db.open_tree("meta")
        .unwrap()
        .insert("format_version", &version.to_be_bytes())
        .unwrap();
    db.flush().unwrap();
    let facts = store_dir.join("facts.bin");
    assert!(facts.exists(), "the scan before kept the facts file");
    std::fs::remove_file(facts).unwrap();
}

fn folder_size(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| {
            let e = e.unwrap();
            if e.file_type().unwrap().is_dir() {
                folder_size(&e.path())
            } else {
                e.metadata().unwrap().len()
            }
        })
        .sum()
}

/// Each command exits 1 on a store of `version`, saying to rebuild it.
fn refused_with_the_way_out(root: &Path, version: u32, commands: &[&[&str]], who: &str) {
    for args in commands {
        let out = tagweave(root, args);
        assert_eq!(out.status.code(), Some(1), "{args:?} on an {who} store");
        let message = stderr_of(&out);
        assert!(
            message.contains(&format!(
                "was written in format version {version}, this tagweave reads version \
                 {FORMAT_VERSION}; rebuild it from the pictures and sidecars with \
                 `tagweave scan FOLDER --rebuild`"
            )),
            "{args:?} on an {who} store: {message}"
        );
    }
}

#[test]
fn a_store_of_another_format_version_is_refused_with_the_way_out() {
    let _serial = one_at_a_time();
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    tiny_collection(root);
    let first = tagweave(root, &["scan", "."]);
    assert_eq!(first.status.code(), Some(0), "{}", stderr_of(&first));
    let sidecars = sidecar_snapshot(root);

    for (version, who) in [(0, "older"), (FORMAT_VERSION + 1, "newer")] {
        set_format_version(&root.join(".tagweave"), version);
        refused_with_the_way_out(root, version, &[&["scan", "."], &["tags"]], who);
        // Following the advice works and loses nothing the sidecars hold.
        let rebuilt = tagweave(root, &["scan", ".", "--rebuild", "--json"]);
        assert_eq!(rebuilt.status.code(), Some(0), "{}", stderr_of(&rebuilt));
        let report = json(&rebuilt);
        assert_eq!(
            (report["items"].as_u64(), report["added"].as_u64()),
            (Some(3), Some(3))
        );
        assert_eq!(report["tags"], 4, "{report}");
    }
    assert!(sidecar_snapshot(root) == sidecars, "no sidecar touched");
    eprintln!(
        "format versions 0 and {} refused with the --rebuild advice, rebuild worked; {:.2} s",
        FORMAT_VERSION + 1,
        started.elapsed().as_secs_f64()
    );
}

#[test]
fn committed_stores_of_older_formats_are_refused_with_the_way_out() {
    let _serial = one_at_a_time();
    for version in OLDER_FIXTURES {
        let temp = tempfile::tempdir().unwrap();
        let root = temp.path().join("collection");
        copy_all(&fixture_of(version), &root);
        let sidecars = sidecar_snapshot(&root);
        let commands: [&[&str]; 3] = [&["scan", "."], &["tags"], &["find", "harbour"]];
        refused_with_the_way_out(&root, version, &commands, "older");
        let rebuilt = tagweave(&root, &["scan", ".", "--rebuild", "--json"]);
        assert_eq!(rebuilt.status.code(), Some(0), "{}", stderr_of(&rebuilt));
        assert_eq!(json(&rebuilt)["items"], 3);
        assert!(sidecar_snapshot(&root) == sidecars, "no sidecar touched");
    }
}

#[test]
fn the_committed_store_of_the_current_format_still_reads() {
    let _serial = one_at_a_time();
    let started = Instant::now();
    let fixture = fixture_dir();
    assert!(
        fixture.join(FIXTURE_STORE).join("db").exists(),
        "{} is missing; write it with `cargo test -p tagweave --test store_format -- \
         --ignored write_the_format_fixture`",
        fixture.display()
    );
    let size = folder_size(&fixture);
    assert!(
        size < 600_000,
        "the fixture grew to {size} bytes; keep it small"
    );
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("collection");
    copy_all(&fixture, &root);

    if FORMAT_VERSION != FIXTURE_VERSION {
        // The version was bumped: the old store must now be refused with the way out.
        // Keep this fixture and commit one of the new version beside it.
        let out = tagweave(&root, &["scan", "."]);
        assert_eq!(out.status.code(), Some(1));
        assert!(stderr_of(&out).contains("--rebuild"), "{}", stderr_of(&out));
        eprintln!(
            "format {FIXTURE_VERSION} fixture refused by format {FORMAT_VERSION}: add a \
             fixture of format {FORMAT_VERSION}"
        );
        return;
    }

    {
        let (_copy, store) = open_store_copy(&root);
        let mut items: Vec<(String, Vec<String>)> = store
            .items()
            .unwrap()
            .into_iter()
            .map(|i| (i.rel_path, i.tags))
            .collect();
        items.sort();
        let strings = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert_eq!(
            items,
            [
                ("harbour.png".to_string(), strings(&["harbour", "boats"])),
                (
                    "lighthouse.jpg".to_string(),
                    strings(&["lighthouse", "night"])
                ),
                ("untagged/quay.png".to_string(), vec![]),
            ]
        );
        let extractor: tagweave_vision::FeatureExtractor = store
            .blob(tagweave_store::EXTRACTOR_BLOB)
            .unwrap()
            .expect("the fixture holds a learned extractor");
        let table = tagweave_store::FeatureTable::load(&store).unwrap();
        assert_eq!(table.features.dim(), (3, extractor.dimension()));
        assert!(table.features.iter().all(|v| v.is_finite()));
    }

    // The binary reads it too, and reuses what it holds instead of redoing it.
    let tags = tagweave(&root, &["tags", "--json"]);
    assert_eq!(tags.status.code(), Some(0), "{}", stderr_of(&tags));
    assert_eq!(json(&tags)["distinct"], 4);
    let out = tagweave(&root, &["scan", ".", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["items"], 3, "{report}");
    assert_eq!(report["added"], 0, "{report}");
    assert_eq!(
        report["features"]["learned"], false,
        "stored extractor reused: {report}"
    );
    assert_eq!(
        report["features"]["encoded"], 0,
        "stored vectors kept: {report}"
    );
    eprintln!(
        "format {FIXTURE_VERSION} fixture ({size} bytes) read by the library and the binary; \
         {:.2} s",
        started.elapsed().as_secs_f64()
    );
}

/// Writes `tests/fixtures/store-format-N/` with the current code. Run it only when adding
/// the fixture of a new format version (and bump `FIXTURE_VERSION` with a new test for it);
/// an existing fixture is never rewritten, since rewriting it would hide the break it is
/// there to catch.
#[test]
#[ignore = "writes the committed fixture; run by hand for a new format version"]
fn write_the_format_fixture() {
    let dir = repo_root().join(format!("tests/fixtures/store-format-{FORMAT_VERSION}"));
    assert!(!dir.exists(), "{} exists; never rewrite it", dir.display());
    tiny_collection(&dir);
    let out = tagweave(&dir, &["scan", "."]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    std::fs::remove_file(dir.join(".tagweave/lock")).unwrap();
    std::fs::rename(dir.join(".tagweave"), dir.join(FIXTURE_STORE)).unwrap();
    eprintln!("wrote {} ({} bytes)", dir.display(), folder_size(&dir));
}
