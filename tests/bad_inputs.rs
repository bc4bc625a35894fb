//! `tagweave scan` over one folder holding every kind of bad input a collection meets:
//! each file is named with its reason, counted by reason, the run goes on, and the exit
//! code is 3 ("done, with files skipped"). A few targeted runs cover what one folder
//! cannot (decompression bombs under a memory cap, followed symlink loops, files that
//! vanish mid-scan).

mod common;
mod corpus;

use std::collections::{BTreeMap, BTreeSet};
use std::net::TcpListener;
use std::path::Path;
use std::process::Command;
use std::sync::Mutex;
use std::time::Instant;

use common::*;
use tagweave_collection::{ItemRecord, SkipReason};
use tagweave_indexer::{ScanOptions, ScanProgress};
use tagweave_store::Store;

/// What a file of the corpus must lead to.
#[derive(Debug)]
enum Expect {
    /// Indexed and described, with this many tags; no summary line complains about it.
    Indexed { tags: usize },
    /// Indexed, and `--verbose` prints a note on it that says this.
    IndexedWithNote { tags: usize, note: &'static str },
    /// Neither indexed nor complained about; `--verbose` prints a note that says this.
    NotedOnly { note: &'static str },
    /// Passed over and counted under `label`; its summary line names the file and says
    /// every one of `says`.
    Skipped {
        label: &'static str,
        says: &'static [&'static str],
    },
}

struct Case {
    class: &'static str,
    /// The file the outcome is about (for a bad sidecar: its picture), relative.
    file: &'static str,
    expect: Expect,
}

const SECRET: &str = "s3cr3t-never-to-be-read";

/// Writes the corpus under `root` and says what each file must lead to. `port` is a local
/// listener an external entity points at; `secret` a file outside the collection another
/// one points at.
fn build_corpus(root: &Path, port: u16, secret: &Path) -> Vec<Case> {
    use corpus::*;
    use Expect::*;
    let mut cases = Vec::new();
    let mut case = |class, file, bytes: &[u8], expect| {
        put(root, file, bytes);
        cases.push(Case {
            class,
            file,
            expect,
        });
    };
    // A good picture with a sidecar, for pictures whose sidecar is the bad part.
    let sidecar_case = |name: &str, sidecar: &str, bytes: &[u8], seed| {
        put(root, name, &rgb_jpeg(48, 32, seed));
        put(root, sidecar, bytes);
    };

    case(
        "control: good JPEG with a text sidecar",
        "control.jpg",
        &rgb_jpeg(64, 48, 1),
        Indexed { tags: 2 },
    );
    put(root, "control.txt", b"harbour\nnight boats\n");

    let photo = rgb_jpeg(400, 300, 2);
    case(
        "truncated JPEG (first 40% of the bytes)",
        "truncated.jpg",
        &truncated(&photo, 0.4),
        Skipped {
            label: "damaged picture",
            says: &["damaged or cut short", "re-export"],
        },
    );
    case(
        "JPEG with garbage after the header",
        "garbage-after-header.jpg",
        &jpeg_with_garbage_after_header(&photo, 99),
        Skipped {
            label: "damaged picture",
            says: &["damaged or cut short"],
        },
    );
    case(
        "PNG with a bad CRC",
        "bad-crc.png",
        &png_with_bad_crc(&rgb_png(60, 40, 3)),
        Skipped {
            label: "damaged picture",
            says: &["damaged or cut short", "CRC"],
        },
    );
    case(
        "PNG declaring 60000x60000 (over the side limit)",
        "bomb-side.png",
        &png_declaring(60_000, 60_000),
        Skipped {
            label: "too large",
            says: &["safety limit", "decompression bomb"],
        },
    );
    case(
        "PNG declaring 29999x29999 (over the pixel limit)",
        "bomb-pixels.png",
        &png_declaring(29_999, 29_999),
        Skipped {
            label: "too large",
            says: &["safety limit", "29999x29999"],
        },
    );
    case(
        "JPEG declaring 65000x65000",
        "bomb.jpg",
        &jpeg_declaring(65_000, 65_000),
        Skipped {
            label: "too large",
            says: &["safety limit", "65000x65000"],
        },
    );
    case(
        "zero-byte file named .jpg",
        "empty.jpg",
        b"",
        Skipped {
            label: "empty file",
            says: &["the file is empty"],
        },
    );
    case(
        "text file named .png",
        "letter.png",
        b"Dear keeper of the archive,\nthe boxes arrived.\n",
        Skipped {
            label: "not an image",
            says: &["not a picture"],
        },
    );
    case(
        "PNG named .jpg (wrong extension)",
        "png-named.jpg",
        &rgb_png(40, 40, 4),
        IndexedWithNote {
            tags: 0,
            note: "content is PNG but the name ends in .jpg; read as PNG",
        },
    );
    case(
        "JPEG with no extension",
        "no-extension",
        &rgb_jpeg(40, 30, 5),
        IndexedWithNote {
            tags: 0,
            note: "content is JPEG but the name has no extension",
        },
    );
    case(
        "1x1 PNG",
        "one-pixel.png",
        &rgb_png(1, 1, 6),
        Indexed { tags: 0 },
    );
    case(
        "1x10000 PNG",
        "one-by-ten-thousand.png",
        &rgb_png(1, 10_000, 7),
        Indexed { tags: 0 },
    );
    case(
        "16-bit RGB PNG",
        "deep-16bit.png",
        &rgb16_png(50, 40),
        Indexed { tags: 0 },
    );
    case(
        "greyscale PNG",
        "grey.png",
        &grey_png(50, 40),
        Indexed { tags: 0 },
    );
    case(
        "greyscale JPEG",
        "grey.jpg",
        &grey_jpeg(50, 40),
        Indexed { tags: 0 },
    );
    case(
        "CMYK JPEG (Adobe APP14)",
        "cmyk.jpg",
        &std::fs::read(repo_root().join("crates/vision/testdata/cmyk-cyan-white.jpg")).unwrap(),
        Indexed { tags: 0 },
    );
    case(
        "palette PNG",
        "palette.png",
        &palette_png(50, 40),
        Indexed { tags: 0 },
    );
    case(
        "PNG with alpha",
        "alpha.png",
        &rgba_png(50, 40),
        Indexed { tags: 0 },
    );
    case(
        "animated GIF (3 frames)",
        "animated.gif",
        &animated_gif(40, 30),
        Indexed { tags: 0 },
    );

    // Camera RAW files: the test files of crates/collection/testdata/raw (written by
    // tifffile and laid out by make_fixtures.py there; ExifTool 12.57 reads them as DNG,
    // CR2 and NEF), then a named change.
    case(
        "camera RAW (DNG) with a JPEG preview, keywords inside and a text sidecar",
        "reef.dng",
        &raw_fixture("preview.dng"),
        // Its keyword note comes with the scan that reads it, not the rescan checked below.
        Indexed { tags: 2 },
    );
    put(root, "reef.txt", b"rock pool\n");
    case(
        "camera RAW (CR2) with a text sidecar",
        "real.CR2",
        &raw_fixture("preview.cr2"),
        Indexed { tags: 1 },
    );
    put(root, "real.txt", b"harbour\n");
    case(
        "truncated camera RAW (first 40% of a CR2)",
        "cut.cr2",
        &truncated(&raw_fixture("preview.cr2"), 0.4),
        Skipped {
            label: "damaged picture",
            says: &["cut short", "past the end of the file"],
        },
    );
    case(
        "camera RAW (NEF) with no preview inside",
        "bare.nef",
        &raw_fixture("no-preview.nef"),
        Skipped {
            label: "damaged picture",
            says: &["no JPEG preview inside"],
        },
    );
    // No HEIC encoder is at hand: the file is the `ftyp` box a HEIC begins with (ISO/IEC
    // 14496-12 box layout, brand "heic" of ISO/IEC 23008-12), which is all that is read.
    case(
        "HEIC picture with a text sidecar (not read yet)",
        "phone.heic",
        b"\0\0\0\x18ftypheic\0\0\0\0mif1heic",
        Skipped {
            label: "format not read yet",
            says: &["HEIC pictures are not read yet", "JPEG copy"],
        },
    );
    put(root, "phone.txt", b"beach\n");

    sidecar_case("latin1.jpg", "latin1.txt", b"harbour\ncaf\xe9\n", 11);
    cases.push(Case {
        class: "non-UTF-8 text sidecar",
        file: "latin1.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["latin1.txt", "line 2 is not UTF-8", "re-save"],
        },
    });
    let many: String = (0..100_000).map(|i| format!("tag{i:06}\n")).collect();
    sidecar_case("many-tags.jpg", "many-tags.txt", many.as_bytes(), 12);
    cases.push(Case {
        class: "text sidecar with 100,000 tags",
        file: "many-tags.jpg",
        expect: Indexed { tags: 100_000 },
    });
    sidecar_case("long-line.jpg", "long-line.txt", &vec![b'a'; 1 << 20], 13);
    cases.push(Case {
        class: "text sidecar with a 1 MB line",
        file: "long-line.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["long-line.txt", "line 1 is longer than 65536 bytes"],
        },
    });
    let lol = r#"<?xml version="1.0"?>
<!DOCTYPE lolz [
 <!ENTITY lol "lol">
 <!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
 <!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">
 <!ENTITY lol4 "&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;">
 <!ENTITY lol5 "&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;">
 <!ENTITY lol6 "&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;">
 <!ENTITY lol7 "&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;">
 <!ENTITY lol8 "&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;">
 <!ENTITY lol9 "&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;">
]>
<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#" xmlns:dc="http://purl.org/dc/elements/1.1/">
 <rdf:Description><dc:subject><rdf:Bag><rdf:li>&lol9;</rdf:li></rdf:Bag></dc:subject></rdf:Description>
</rdf:RDF>"#;
    sidecar_case("entity-bomb.jpg", "entity-bomb.xmp", lol.as_bytes(), 14);
    cases.push(Case {
        class: "XMP with an internal entity-expansion bomb",
        file: "entity-bomb.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["entity-bomb.xmp", "DOCTYPE", "never expanded"],
        },
    });
    let body = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#" xmlns:dc="http://purl.org/dc/elements/1.1/">
 <rdf:Description><dc:subject><rdf:Bag><rdf:li>&xxe;</rdf:li><rdf:li>&web;</rdf:li></rdf:Bag></dc:subject></rdf:Description>
</rdf:RDF>"#;
    let xxe = format!(
        "<!DOCTYPE r [<!ENTITY xxe SYSTEM \"file://{}\"><!ENTITY web SYSTEM \"http://127.0.0.1:{port}/tags\">]>\n{body}",
        secret.display()
    );
    sidecar_case(
        "external-entity.jpg",
        "external-entity.xmp",
        xxe.as_bytes(),
        15,
    );
    cases.push(Case {
        class: "XMP with external entities (file:// and http://)",
        file: "external-entity.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["external-entity.xmp", "DOCTYPE"],
        },
    });
    let dtd = format!("<!DOCTYPE r SYSTEM \"http://127.0.0.1:{port}/evil.dtd\">\n{body}");
    sidecar_case("external-dtd.jpg", "external-dtd.xmp", dtd.as_bytes(), 16);
    cases.push(Case {
        class: "XMP with an external DTD (http://)",
        file: "external-dtd.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["external-dtd.xmp", "DOCTYPE"],
        },
    });
    let broken = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"><rdf:Bag><rdf:li>pier</rdf:Seq></rdf:RDF>"#;
    sidecar_case("malformed.jpg", "malformed.xmp", broken.as_bytes(), 17);
    cases.push(Case {
        class: "XMP that is not well-formed",
        file: "malformed.jpg",
        expect: Skipped {
            label: "bad sidecar",
            says: &["malformed.xmp", "not well-formed", "rdf:li"],
        },
    });

    #[cfg(unix)]
    {
        use std::os::unix::fs::symlink;
        put(root, "loops/inside.jpg", &rgb_jpeg(40, 30, 18));
        symlink("..", root.join("loops/up")).unwrap();
        cases.push(Case {
            class: "picture in a folder with a symlink loop",
            file: "loops/inside.jpg",
            expect: Indexed { tags: 0 },
        });
        cases.push(Case {
            class: "symlink loop (links not followed: the default)",
            file: "loops/up",
            expect: NotedOnly {
                note: "symbolic link not followed",
            },
        });
    }
    cases
}

/// `skipped_files` of a `scan --json` report as (path, reason) pairs, after checking that
/// it lists as many files as `skipped` counts and that a bad sidecar's entry names its
/// sidecar (same stem as the picture) while no other entry names one.
fn listed_skips(report: &serde_json::Value) -> BTreeSet<(String, String)> {
    let entries = report["skipped_files"].as_array().expect("skipped_files");
    let counted: u64 = report["skipped"]
        .as_object()
        .unwrap()
        .values()
        .map(|v| v.as_u64().unwrap())
        .sum();
    assert_eq!(entries.len() as u64, counted, "{report}");
    let mut listed = BTreeSet::new();
    for entry in entries {
        let path = entry["path"].as_str().unwrap().to_string();
        let reason = entry["reason"].as_str().unwrap().to_string();
        assert!(!entry["message"].as_str().unwrap().is_empty(), "{entry}");
        match entry.get("sidecar") {
            Some(sidecar) => {
                assert_eq!(reason, "bad sidecar", "{entry}");
                let stem = |p: &str| Path::new(p).with_extension("");
                assert_eq!(stem(sidecar.as_str().unwrap()), stem(&path), "{entry}");
            }
            None => assert_ne!(reason, "bad sidecar", "{entry}"),
        }
        assert!(listed.insert((path, reason)), "listed twice: {entry}");
    }
    listed
}

/// The summary lines (skips and notes) that name `file`.
fn lines_naming<'t>(text: &'t str, file: &str) -> Vec<&'t str> {
    let key = format!("/{file}:");
    text.lines().filter(|l| l.contains(&key)).collect()
}

#[test]
fn every_kind_of_bad_input_is_named_counted_and_passed_over() {
    let _serial = one_at_a_time();
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("corpus");
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    listener.set_nonblocking(true).unwrap();
    let secret = put(temp.path(), "secret.txt", SECRET.as_bytes());
    let port = listener.local_addr().unwrap().port();
    let cases = build_corpus(&root, port, &secret);
    let sidecars_before = sidecar_snapshot(&root);

    let out = tagweave(&root, &["scan", ".", "--json"]);
    assert_eq!(
        out.status.code(),
        Some(3),
        "3 = done with skipped files\n{}",
        stderr_of(&out)
    );
    let report = json(&out);

    // Counted by reason: exactly the skips the corpus calls for, nothing more.
    let mut expected_skips: BTreeMap<String, u64> = BTreeMap::new();
    for case in &cases {
        if let Expect::Skipped { label, .. } = case.expect {
            *expected_skips.entry(label.to_string()).or_default() += 1;
        }
    }
    let counted: BTreeMap<String, u64> = report["skipped"]
        .as_object()
        .unwrap()
        .iter()
        .map(|(k, v)| (k.clone(), v.as_u64().unwrap()))
        .collect();
    assert_eq!(counted, expected_skips, "{report}");
    // ...and listed file by file, relative to the folder, with the same reason words.
    let expected_listed: BTreeSet<(String, String)> = cases
        .iter()
        .filter_map(|case| match case.expect {
            Expect::Skipped { label, .. } => Some((case.file.to_string(), label.to_string())),
            _ => None,
        })
        .collect();
    assert_eq!(listed_skips(&report), expected_listed, "{report}");

    // The run went on: every acceptable picture is indexed and described, no other.
    let expected_items: BTreeMap<&str, usize> = cases
        .iter()
        .filter_map(|c| match c.expect {
            Expect::Indexed { tags } | Expect::IndexedWithNote { tags, .. } => Some((c.file, tags)),
            _ => None,
        })
        .collect();
    let (_copy, store) = open_store_copy(&root);
    let items: BTreeMap<String, ItemRecord> = store
        .items()
        .unwrap()
        .into_iter()
        .map(|i| (i.rel_path.clone(), i))
        .collect();
    let indexed: BTreeSet<&str> = items.keys().map(String::as_str).collect();
    assert_eq!(
        indexed,
        expected_items.keys().copied().collect::<BTreeSet<_>>()
    );
    for (file, tags) in &expected_items {
        assert_eq!(items[*file].tags.len(), *tags, "{file}");
        assert!(
            store
                .vector(tagweave_store::FEATURES, &items[*file].id)
                .unwrap()
                .is_some_and(|v| v.iter().all(|x| x.is_finite())),
            "{file} is described with finite features"
        );
        assert!(
            items[*file].tags.iter().all(|t| !t.contains(SECRET)),
            "{file}"
        );
    }
    drop(store);
    assert_eq!(report["items"], expected_items.len(), "{report}");
    assert_eq!(
        report["features"]["encoded"],
        expected_items.len(),
        "{report}"
    );
    assert_eq!(report["other_files"], 0, "{report}");
    let json_seconds = report["seconds"].as_f64().unwrap();

    // A second run names every file with its reason (skipped files are tried again).
    let verbose = tagweave(&root, &["scan", ".", "--verbose"]);
    assert_eq!(verbose.status.code(), Some(3), "{}", stderr_of(&verbose));
    let text = stdout_of(&verbose);
    let mut table = Vec::new();
    for case in &cases {
        let lines = lines_naming(&text, case.file);
        let outcome = match &case.expect {
            Expect::Indexed { tags } => {
                assert!(
                    lines.is_empty(),
                    "{}: nothing to say about it:\n{lines:?}",
                    case.file
                );
                format!("indexed and described, {tags} tags")
            }
            Expect::IndexedWithNote { note, .. } | Expect::NotedOnly { note } => {
                let found = lines
                    .iter()
                    .find(|l| l.trim_start().starts_with("note:") && l.contains(note));
                assert!(
                    found.is_some() && lines.len() == 1,
                    "{}: one note saying {note:?}:\n{text}",
                    case.file
                );
                let kind = if matches!(case.expect, Expect::NotedOnly { .. }) {
                    "left alone"
                } else {
                    "indexed"
                };
                format!("{kind}; note: {note}")
            }
            Expect::Skipped { label, says } => {
                let found = lines
                    .iter()
                    .find(|l| !l.contains("note:") && says.iter().all(|s| l.contains(s)));
                let Some(line) = found else {
                    panic!(
                        "{}: a summary line naming it and saying {says:?}:\n{text}",
                        case.file
                    );
                };
                let message = line.trim().trim_start_matches("skipped: ");
                let message = message.replace(&*root.to_string_lossy(), "");
                let message = message.replace(&*temp.path().to_string_lossy(), "");
                format!("skipped [{label}] {}", shorten(&message, 150))
            }
        };
        table.push((case.class, outcome));
    }
    let per_label: BTreeSet<String> = expected_skips.keys().cloned().collect();
    for label in &per_label {
        assert!(
            text.lines()
                .any(|l| l.contains("skipped") && l.contains(label.as_str())),
            "the summary counts {label}:\n{text}"
        );
    }

    // Nothing was fetched and nothing outside the collection was read into it.
    match listener.accept() {
        Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => {}
        other => panic!("an external entity was fetched: {other:?}"),
    }
    assert!(!text.contains(SECRET) && !stdout_of(&out).contains(SECRET));
    assert_eq!(
        sidecar_snapshot(&root),
        sidecars_before,
        "no sidecar was touched"
    );

    eprintln!("\nclass -> outcome (tagweave scan, exit code 3, run went on):");
    eprintln!("| class | outcome |\n|---|---|");
    for (class, outcome) in &table {
        eprintln!("| {class} | {outcome} |");
    }
    eprintln!(
        "(unreadable files and folders: see unreadable_files_and_folders_are_named_and_skipped)"
    );
    eprintln!(
        "corpus: {} cases, scan {json_seconds:.2} s; whole test {:.1} s",
        table.len(),
        started.elapsed().as_secs_f64()
    );
}

fn shorten(text: &str, max: usize) -> String {
    if text.chars().count() <= max {
        text.to_string()
    } else {
        format!("{}…", text.chars().take(max).collect::<String>())
    }
}

/// Three pictures that decode, so a folder can learn features whatever else it holds.
fn good_pictures(root: &Path) {
    for seed in 0..3 {
        put(
            root,
            &format!("good-{seed}.jpg"),
            &corpus::rgb_jpeg(96, 64, 30 + seed),
        );
    }
}

/// Under an address-space cap far below what any of the declared pictures would take
/// (the smallest, 29999x29999 RGB, is 2.7 GB), a scan must still finish: the sizes are
/// refused from the headers, before any pixel buffer exists.
#[cfg(target_os = "linux")]
#[test]
fn decompression_bombs_are_refused_before_any_pixel_buffer_exists() {
    let _serial = one_at_a_time();
    // Measured: a scan of this folder runs in well under 800 MB of address space with two
    // worker threads (thread stacks and malloc arenas are most of it).
    const CAP_KB: u64 = 1_500_000;
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    good_pictures(root);
    put(root, "side.png", &corpus::png_declaring(60_000, 60_000));
    put(root, "pixels.png", &corpus::png_declaring(29_999, 29_999));
    put(root, "huge.jpg", &corpus::jpeg_declaring(65_000, 65_000));
    put(root, "wide.jpg", &corpus::jpeg_declaring(65_535, 2_000));
    let out = Command::new("sh")
        .arg("-c")
        .arg(format!("ulimit -v {CAP_KB} && exec \"$0\" \"$@\""))
        .arg(env!("CARGO_BIN_EXE_tagweave"))
        .args(["scan", ".", "--json"])
        .current_dir(root)
        .env("RAYON_NUM_THREADS", "2")
        .env("MALLOC_ARENA_MAX", "2")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(3), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["items"], 3, "{report}");
    assert_eq!(
        report["skipped"],
        serde_json::json!({"too large": 4}),
        "{report}"
    );
    let listing = tagweave(root, &["scan", ".", "--verbose"]);
    let text = stdout_of(&listing);
    for name in ["side.png", "pixels.png", "huge.jpg", "wide.jpg"] {
        let lines = lines_naming(&text, name);
        assert!(
            lines.len() == 1 && lines[0].contains("safety limit"),
            "{name}:\n{text}"
        );
    }
    eprintln!(
        "bombs refused under a {} MB address-space cap in {:.2} s (scan {:.2} s)",
        CAP_KB / 1000,
        started.elapsed().as_secs_f64(),
        report["seconds"].as_f64().unwrap()
    );
}

#[cfg(unix)]
#[test]
fn followed_symlink_loops_and_dangling_links_are_named_and_skipped() {
    let _serial = one_at_a_time();
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    good_pictures(root);
    put(root, "sub/deeper.jpg", &corpus::rgb_jpeg(50, 40, 40));
    std::os::unix::fs::symlink("..", root.join("sub/loop")).unwrap();
    std::os::unix::fs::symlink("nowhere.jpg", root.join("dangling.jpg")).unwrap();

    let plain = json(&tagweave(root, &["scan", ".", "--json"]));
    assert_eq!(plain["items"], 4, "{plain}");
    assert_eq!(plain["skipped"], serde_json::json!({}), "{plain}");

    let out = tagweave(root, &["scan", ".", "--json", "--follow-symlinks"]);
    assert_eq!(out.status.code(), Some(3), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["items"], 4, "each picture once: {report}");
    assert_eq!(
        report["skipped"],
        serde_json::json!({"symlink loop": 1, "unreadable": 1}),
        "{report}"
    );
    assert_eq!(
        listed_skips(&report),
        BTreeSet::from([
            ("dangling.jpg".to_string(), "unreadable".to_string()),
            ("sub/loop".to_string(), "symlink loop".to_string()),
        ]),
        "{report}"
    );
    let text = stdout_of(&tagweave(
        root,
        &["scan", ".", "--verbose", "--follow-symlinks"],
    ));
    assert!(
        lines_naming(&text, "sub/loop")
            .iter()
            .any(|l| l.contains("leads back into a folder")),
        "{text}"
    );
    assert!(
        lines_naming(&text, "dangling.jpg")
            .iter()
            .any(|l| l.contains("cannot be read")),
        "{text}"
    );
    eprintln!(
        "symlink loop (followed) -> skipped [symlink loop]; dangling link -> skipped [unreadable]; {:.2} s",
        started.elapsed().as_secs_f64()
    );
}

/// A file deleted between the crawl and the read, or between the read and the decode,
/// cannot be timed from outside the binary; the scan's own progress callback is the hook.
#[test]
fn files_deleted_mid_scan_are_reported_as_vanished() {
    let _serial = one_at_a_time();
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("pictures");
    good_pictures(&root);
    let before_read = put(&root, "gone-before-read.jpg", &corpus::rgb_jpeg(50, 40, 50));
    let before_decode = put(
        &root,
        "gone-before-decode.jpg",
        &corpus::rgb_jpeg(50, 40, 51),
    );
    put(&root, "sidecar-gone.jpg", &corpus::rgb_jpeg(50, 40, 52));
    let sidecar = put(&root, "sidecar-gone.txt", b"pier\n");

    let store = Store::open_or_create(&root.join(".tagweave"), &root).unwrap();
    let events = Mutex::new(Vec::new());
    let report = tagweave_indexer::scan(&store, &ScanOptions::default(), &|event| {
        match event {
            ScanProgress::Crawled { .. } => {
                std::fs::remove_file(&before_read).unwrap();
                std::fs::remove_file(&sidecar).unwrap();
            }
            ScanProgress::Read { done, total } if done == total => {
                std::fs::remove_file(&before_decode).unwrap();
            }
            _ => {}
        }
        events.lock().unwrap().push(format!("{event:?}"));
    })
    .unwrap();

    let vanished: BTreeMap<String, String> = report
        .skipped_files
        .iter()
        .filter(|s| s.reason == SkipReason::Vanished)
        .map(|s| {
            (
                s.path.file_name().unwrap().to_string_lossy().into_owned(),
                s.to_string(),
            )
        })
        .collect();
    assert_eq!(
        vanished.keys().map(String::as_str).collect::<Vec<_>>(),
        [
            "gone-before-decode.jpg",
            "gone-before-read.jpg",
            "sidecar-gone.txt"
        ],
        "{:?}",
        report.skipped_files
    );
    for message in vanished.values() {
        assert!(
            message.contains("disappeared during the scan; scan again"),
            "{message}"
        );
    }
    assert_eq!(
        report
            .skipped
            .iter()
            .map(|(k, v)| (*k, *v))
            .collect::<Vec<_>>(),
        [("vanished", 3)]
    );
    let items: BTreeSet<String> = store
        .items()
        .unwrap()
        .into_iter()
        .map(|i| i.rel_path)
        .collect();
    assert_eq!(
        items,
        BTreeSet::from(["good-0.jpg", "good-1.jpg", "good-2.jpg"].map(String::from)),
        "a vanished picture is not kept; one whose sidecar vanished waits for the next scan"
    );

    // The next scan picks up the picture whose sidecar went, now untagged.
    let again = tagweave_indexer::scan(&store, &ScanOptions::default(), &|_| {}).unwrap();
    assert!(again.skipped.is_empty(), "{:?}", again.skipped_files);
    assert_eq!((again.items, again.added, again.untagged), (4, 1, 4));
    eprintln!(
        "file deleted after crawl -> skipped [vanished]; after read, before decode -> skipped \
         [vanished]; sidecar deleted after crawl -> picture skipped [vanished] this run, indexed \
         untagged by the next; {:.2} s",
        started.elapsed().as_secs_f64()
    );
}

/// Mode-000 files and folders. File modes do not stop root, so when the tests run as root
/// the scan runs as `nobody` through `setpriv` where that exists; otherwise the case is
/// skipped with a line saying so.
#[cfg(target_os = "linux")]
#[test]
fn unreadable_files_and_folders_are_named_and_skipped() {
    use std::os::unix::fs::PermissionsExt;
    let _serial = one_at_a_time();
    let started = Instant::now();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path().join("locked");
    good_pictures(&root);
    put(&root, "unreadable.jpg", &corpus::rgb_jpeg(40, 30, 60));
    put(
        &root,
        "locked-folder/inside.jpg",
        &corpus::rgb_jpeg(40, 30, 61),
    );
    put(&root, "locked-sidecar.jpg", &corpus::rgb_jpeg(40, 30, 62));
    put(&root, "locked-sidecar.txt", b"pier\n");
    let mode = |rel: &str, mode| {
        std::fs::set_permissions(root.join(rel), std::fs::Permissions::from_mode(mode)).unwrap()
    };

    let mut prefix: Vec<String> = Vec::new();
    let how = if !permissions_are_ignored(temp.path()) {
        "as this user".to_string()
    } else {
        let setpriv = ["--reuid=65534", "--regid=65534", "--clear-groups", "--"];
        let probe = Command::new("setpriv")
            .args(setpriv)
            .arg(env!("CARGO_BIN_EXE_tagweave"))
            .arg("--version")
            .output();
        match probe {
            Ok(out) if out.status.success() => {
                prefix.push("setpriv".into());
                prefix.extend(setpriv.map(String::from));
                // `nobody` must reach the folder and write the store in it.
                std::fs::set_permissions(temp.path(), std::fs::Permissions::from_mode(0o755))
                    .unwrap();
                std::fs::set_permissions(&root, std::fs::Permissions::from_mode(0o777)).unwrap();
                "as nobody (uid 65534) via setpriv, since this test runs as root".to_string()
            }
            other => {
                eprintln!(
                    "skipped: running as root, where a mode-000 file is still readable, and \
                     `setpriv` cannot run tagweave as another user here ({other:?})"
                );
                return;
            }
        }
    };
    mode("unreadable.jpg", 0o000);
    mode("locked-folder", 0o000);
    mode("locked-sidecar.txt", 0o000);
    let run = |args: &[&str]| {
        let mut command = match prefix.split_first() {
            Some((program, rest)) => {
                let mut c = Command::new(program);
                c.args(rest).arg(env!("CARGO_BIN_EXE_tagweave"));
                c
            }
            None => Command::new(env!("CARGO_BIN_EXE_tagweave")),
        };
        command.args(args).current_dir(&root).output().unwrap()
    };
    let out = run(&["scan", ".", "--json"]);
    let listing = run(&["scan", ".", "--verbose"]);
    mode("unreadable.jpg", 0o644);
    mode("locked-folder", 0o755);
    mode("locked-sidecar.txt", 0o644);

    assert_eq!(out.status.code(), Some(3), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["items"], 3, "{report}");
    assert_eq!(
        report["skipped"],
        serde_json::json!({"unreadable": 2, "bad sidecar": 1}),
        "{report}"
    );
    assert_eq!(
        listed_skips(&report),
        BTreeSet::from([
            ("locked-folder".to_string(), "unreadable".to_string()),
            ("locked-sidecar.jpg".to_string(), "bad sidecar".to_string()),
            ("unreadable.jpg".to_string(), "unreadable".to_string()),
        ]),
        "{report}"
    );
    let text = stdout_of(&listing);
    for (file, says) in [
        ("unreadable.jpg", "cannot be read (Permission denied"),
        ("locked-folder", "cannot be read (Permission denied"),
        (
            "locked-sidecar.jpg",
            "locked-sidecar.txt cannot be used: cannot be read",
        ),
    ] {
        assert!(
            lines_naming(&text, file).iter().any(|l| l.contains(says)),
            "{file}: {says:?}\n{text}"
        );
    }
    eprintln!(
        "unreadable file -> skipped [unreadable]; unreadable folder -> skipped [unreadable]; \
         unreadable sidecar -> picture skipped [bad sidecar]; run {how}; {:.2} s",
        started.elapsed().as_secs_f64()
    );
}

/// A review sheet with a bad cell is refused naming the line a spreadsheet shows it on
/// (sheets are written with CRLF line ends, which once made the count one short), once
/// as text and, under --json, as one JSON object.
#[test]
fn a_bad_review_sheet_names_the_line_of_the_bad_cell() {
    let _serial = one_at_a_time();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    good_pictures(root);
    let scan = tagweave(root, &["scan", ".", "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));
    let sheet = "\u{feff}picture,tag,probability,kind,accept\r\n\
                 good-0.jpg,harbour,0.9,suggested,y\r\n\
                 good-1.jpg,harbour,0.8,suggested,\r\n\
                 good-2.jpg,harbour,0.7,suggested,maybe\r\n";
    put(root, "review.csv", sheet.as_bytes());
    let out = tagweave(root, &["apply", "review.csv", "--dry-run"]);
    assert_eq!(out.status.code(), Some(1));
    let message = stderr_of(&out);
    assert!(message.contains("line 4: `accept` is `maybe`"), "{message}");
    assert_eq!(message.matches("`maybe`").count(), 1, "{message}");
    let out = tagweave(root, &["apply", "review.csv", "--json"]);
    assert_eq!(out.status.code(), Some(1));
    let error = json(&out);
    assert!(
        error["error"].as_str().unwrap().contains("line 4:"),
        "{error}"
    );
}

/// An XMP sidecar written by Exempi 2.6.3 through python-xmp-toolkit 2.1.0, an independent
/// implementation of the standard (tests/fixtures/xmp-exempi/README.md).
fn exempi_fixture(name: &str) -> Vec<u8> {
    std::fs::read(repo_root().join("tests/fixtures/xmp-exempi").join(name)).unwrap()
}

/// `apply` writes accepted tags the way the collection's own sidecars spell them (here XMP
/// sidecars from another implementation), not in the index's normalised form.
#[test]
fn apply_writes_tags_in_the_spelling_of_the_collection() {
    let _serial = one_at_a_time();
    let temp = tempfile::tempdir().unwrap();
    let root = temp.path();
    // source: shore.xmp (Exempi) spells its keywords `Sea`, `  Boats `, `naïve art`.
    put(root, "shore.jpg", &corpus::rgb_jpeg(96, 64, 30));
    put(root, "shore.xmp", &exempi_fixture("shore.xmp"));
    put(root, "quay.jpg", &corpus::rgb_jpeg(96, 64, 31));
    let quay_before = exempi_fixture("quay.xmp");
    put(root, "quay.xmp", &quay_before);
    put(root, "field.jpg", &corpus::rgb_jpeg(96, 64, 32));
    let scan = tagweave(root, &["scan", ".", "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));

    // The sheet holds the index's normalised forms; field.jpg has no sidecar yet and
    // `  BOATS` differs from the collection's `Boats` in case only.
    let sheet = "picture,tag,probability,kind,accept\n\
                 quay.jpg,sea,0.9,suggested,y\n\
                 quay.jpg,naïve-art,0.8,suggested,y\n\
                 field.jpg,  BOATS,0.7,suggested,y\n\
                 field.jpg,wheat-field,0.6,suggested,y\n";
    put(root, "review.csv", sheet.as_bytes());
    let out = tagweave(root, &["apply", "review.csv", "--json"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr_of(&out));
    let report = json(&out);
    assert_eq!(report["tags_added"], 4, "{report}");

    let quay = String::from_utf8(std::fs::read(root.join("quay.xmp")).unwrap()).unwrap();
    // by hand: the two items after `Harbour` (a sheet's tags come in sorted order of their
    // normalised form), in the collection's spelling, and the same two in tagweave's bag of
    // accepted suggestions at the end of the description; nothing else moved.
    let expected = String::from_utf8(quay_before)
        .unwrap()
        .replace(
            "     <rdf:li>Harbour</rdf:li>\n",
            "     <rdf:li>Harbour</rdf:li>\n     <rdf:li>naïve art</rdf:li>\n     <rdf:li>Sea</rdf:li>\n",
        )
        .replace(
            "  </rdf:Description>\n",
            "   <tagweave:acceptedSuggestions xmlns:tagweave=\"https://tagweave.invalid/xmp/1.0/\">\n    \
             <rdf:Bag>\n     <rdf:li>naïve art</rdf:li>\n     <rdf:li>Sea</rdf:li>\n    </rdf:Bag>\n   \
             </tagweave:acceptedSuggestions>\n  </rdf:Description>\n",
        );
    assert_eq!(quay, expected);
    assert!(
        !quay.contains("naïve-art") && !quay.contains(">sea<"),
        "{quay}"
    );
    let field = std::fs::read_to_string(root.join("field.txt")).unwrap();
    assert!(
        field.ends_with("\nBoats # accepted suggestion\nwheat-field # accepted suggestion\n"),
        "a tag the collection never spelled keeps the sheet's form: {field}"
    );
    assert_eq!(
        std::fs::read(root.join("shore.xmp")).unwrap(),
        exempi_fixture("shore.xmp")
    );

    // The index then reads one tag per keyword, each once.
    let scan = tagweave(root, &["scan", ".", "--json"]);
    assert_eq!(scan.status.code(), Some(0), "{}", stderr_of(&scan));
    let tags = stdout_of(&tagweave(root, &["tags", "--json"]));
    for tag in ["sea", "naïve-art", "boats", "wheat-field", "harbour"] {
        assert!(tags.contains(&format!("\"{tag}\"")), "{tag}: {tags}");
    }
}
