//! What the crawler knows about one picture: where it is, how to tell whether it changed,
//! and the tags a person wrote beside it or inside it.

use std::collections::HashSet;
use std::io::ErrorKind;
use std::path::Path;
use std::time::UNIX_EPOCH;

use serde::{Deserialize, Serialize};

use crate::crawl::{Candidate, Note, SkipReason, Skipped};
use crate::embedded::read_embedded;
use crate::error::CollectionError;
use crate::sidecar::{dedup_normalized, read_sidecar};

/// Picture formats recognised by their first bytes (the extension alone is not trusted; it
/// only tells a TIFF-based camera RAW from a TIFF picture, whose headers are the same).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ImageFormat {
    Jpeg,
    Png,
    Webp,
    Tiff,
    Bmp,
    Gif,
    /// Camera RAW files, described through the JPEG preview they hold.
    Dng,
    Cr2,
    Nef,
    Arw,
    Orf,
    Rw2,
    Pef,
}

/// Which kind of sidecar file a tag came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SidecarKind {
    /// `NAME.txt`: one tag per line, commas also separate, `#` starts a comment.
    Text,
    /// `NAME.xmp`: keywords in `dc:subject`.
    Xmp,
}

/// Size and modification time: cheap to read, enough to decide "unchanged" without hashing.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct FileStamp {
    pub size: u64,
    /// Modification time in nanoseconds since the Unix epoch (0 when the platform has none).
    pub mtime_ns: i128,
}

/// A sidecar found beside a picture.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct SidecarRef {
    /// Path relative to the collection root, `/`-separated.
    pub rel_path: String,
    pub kind: SidecarKind,
    pub stamp: FileStamp,
}

/// One indexed picture. The sidecars stay the record; this is a cache of them.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ItemRecord {
    /// Stable id derived from `rel_path` (16 hex digits), so a rescan keeps ids.
    pub id: String,
    /// Path relative to the collection root, `/`-separated.
    pub rel_path: String,
    pub format: ImageFormat,
    pub stamp: FileStamp,
    /// BLAKE3 of the picture's bytes, hex.
    pub content_hash: String,
    pub sidecars: Vec<SidecarRef>,
    /// Normalised tags, de-duplicated, in order of first appearance: text sidecar, XMP
    /// sidecar, then the keywords kept inside the picture (its XMP packet, then IPTC).
    pub tags: Vec<String>,
    /// The tags of `tags` that were suggestions a person accepted: marked so in every
    /// sidecar that carries them (`sidecar::ACCEPTED_MARK`, `sidecar::ACCEPTED_PROPERTY`).
    /// Every other tag a person wrote. Left out of the stored form when empty.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub accepted: Vec<String>,
}

impl ItemRecord {
    /// The tags a person wrote: `tags` without the accepted suggestions.
    pub fn person_tags(&self) -> Vec<String> {
        self.tags
            .iter()
            .filter(|t| !self.accepted.contains(t))
            .cloned()
            .collect()
    }
}

impl ImageFormat {
    /// The name people know the format by, for messages.
    pub fn name(self) -> &'static str {
        match self {
            ImageFormat::Jpeg => "JPEG",
            ImageFormat::Png => "PNG",
            ImageFormat::Webp => "WebP",
            ImageFormat::Tiff => "TIFF",
            ImageFormat::Bmp => "BMP",
            ImageFormat::Gif => "GIF",
            ImageFormat::Dng => "DNG",
            ImageFormat::Cr2 => "CR2",
            ImageFormat::Nef => "NEF",
            ImageFormat::Arw => "ARW",
            ImageFormat::Orf => "ORF",
            ImageFormat::Rw2 => "RW2",
            ImageFormat::Pef => "PEF",
        }
    }

    /// A camera RAW: TIFF directories around sensor data, with a JPEG preview inside.
    pub fn is_camera_raw(self) -> bool {
        use ImageFormat::*;
        matches!(self, Dng | Cr2 | Nef | Arw | Orf | Rw2 | Pef)
    }
}

impl FileStamp {
    pub fn from_metadata(metadata: &std::fs::Metadata) -> FileStamp {
        let mtime_ns = metadata
            .modified()
            .map_or(0, |t| match t.duration_since(UNIX_EPOCH) {
                Ok(after) => after.as_nanos() as i128,
                Err(before) => -(before.duration().as_nanos() as i128),
            });
        FileStamp {
            size: metadata.len(),
            mtime_ns,
        }
    }
}

/// An item read from disk, with anything worth telling the user about it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReadItem {
    pub item: ItemRecord,
    pub notes: Vec<Note>,
}

/// Stable id of a picture: the first 8 bytes of BLAKE3 of its relative path, in hex.
pub fn item_id(rel_path: &str) -> String {
    blake3::hash(rel_path.as_bytes()).to_hex()[..16].to_string()
}

/// True when nothing the record was built from has changed size or time, so a rescan can
/// reuse it without rehashing. An edited, added or removed sidecar counts as a change.
pub fn is_unchanged(previous: &ItemRecord, candidate: &Candidate) -> bool {
    previous.rel_path == candidate.rel_path
        && previous.format == candidate.format
        && previous.stamp == candidate.stamp
        && previous.sidecars == candidate.sidecars
}

/// Hashes the picture and reads its sidecars, then the keywords embedded in the picture's
/// metadata segments. Any sidecar that cannot be read makes the whole item skipped, so
/// nothing downstream ever rewrites a sidecar we did not understand; embedded keywords that
/// cannot be read only leave a note (nothing ever writes into the picture).
pub fn read_item(root: &Path, candidate: &Candidate) -> Result<ReadItem, Skipped> {
    let (stamp, content_hash) = hash_file(&candidate.path).map_err(|e| Skipped {
        path: candidate.path.clone(),
        reason: io_reason(&e),
    })?;

    let in_order = [SidecarKind::Text, SidecarKind::Xmp]
        .into_iter()
        .flat_map(|kind| candidate.sidecars.iter().filter(move |s| s.kind == kind));
    let mut sidecars = Vec::with_capacity(candidate.sidecars.len());
    let mut tags = Vec::new();
    let mut marked = Vec::new();
    let mut unmarked = HashSet::new();
    for sidecar in in_order {
        let path = root.join(&sidecar.rel_path);
        let bad = |reason| Skipped {
            path: candidate.path.clone(),
            reason,
        };
        let metadata = std::fs::metadata(&path).map_err(|e| match e.kind() {
            ErrorKind::NotFound => Skipped {
                path: path.clone(),
                reason: SkipReason::Vanished,
            },
            _ => bad(SkipReason::BadSidecar {
                sidecar: path.clone(),
                problem: e.to_string(),
            }),
        })?;
        let read = read_sidecar(&path, sidecar.kind).map_err(|e| match e {
            CollectionError::Sidecar { problem, .. } => match *problem {
                CollectionError::Read(e) if e.kind() == ErrorKind::NotFound => Skipped {
                    path: path.clone(),
                    reason: SkipReason::Vanished,
                },
                problem => bad(SkipReason::BadSidecar {
                    sidecar: path.clone(),
                    problem: problem.to_string(),
                }),
            },
            other => bad(SkipReason::BadSidecar {
                sidecar: path.clone(),
                problem: other.to_string(),
            }),
        })?;
        for tag in &read.tags {
            if read.accepted.contains(tag) {
                marked.push(tag.clone());
            } else {
                unmarked.insert(tag.clone());
            }
        }
        tags.extend(read.tags);
        sidecars.push(SidecarRef {
            rel_path: sidecar.rel_path.clone(),
            kind: sidecar.kind,
            stamp: FileStamp::from_metadata(&metadata),
        });
    }

    let mut notes = Vec::new();
    let embedded = read_embedded(&candidate.path, candidate.format);
    if !embedded.sources.is_empty() {
        notes.push(Note {
            path: candidate.path.clone(),
            message: format!(
                "tags read from inside the picture ({})",
                embedded.sources.join(" and ")
            ),
        });
    }
    for problem in &embedded.problems {
        notes.push(Note {
            path: candidate.path.clone(),
            message: format!(
                "keywords inside the picture not read: {problem}; the picture is indexed \
                 without them"
            ),
        });
    }
    unmarked.extend(
        embedded
            .keywords
            .iter()
            .filter_map(|k| crate::normalize_tag(k)),
    );
    tags.extend(embedded.keywords);
    if sidecars.len() > 1 {
        let names: Vec<&str> = sidecars
            .iter()
            .map(|s| s.rel_path.rsplit('/').next().unwrap_or(&s.rel_path))
            .collect();
        notes.push(Note {
            path: candidate.path.clone(),
            message: format!("tags merged from {}", names.join(" and ")),
        });
    }
    let item = ItemRecord {
        id: item_id(&candidate.rel_path),
        rel_path: candidate.rel_path.clone(),
        format: candidate.format,
        stamp,
        content_hash,
        sidecars,
        tags: dedup_normalized(tags),
        accepted: dedup_normalized(marked)
            .into_iter()
            .filter(|tag| !unmarked.contains(tag))
            .collect(),
    };
    for tag in &item.tags {
        if let Some(c) = crate::misleading_char(tag) {
            notes.push(Note {
                path: candidate.path.clone(),
                message: format!(
                    "tag `{}` holds U+{:04X}, a character that makes text show as something \
                     else (or none at all); check the sidecar",
                    tag.escape_debug(),
                    c as u32
                ),
            });
        }
    }
    Ok(ReadItem { item, notes })
}

/// Stamp taken from the open handle before reading: if the file changes while we hash,
/// the stored stamp is the older one and the next scan looks again.
fn hash_file(path: &Path) -> std::io::Result<(FileStamp, String)> {
    let file = std::fs::File::open(path)?;
    let stamp = FileStamp::from_metadata(&file.metadata()?);
    let mut hasher = blake3::Hasher::new();
    hasher.update_reader(file)?;
    Ok((stamp, hasher.finalize().to_hex().to_string()))
}

fn io_reason(e: &std::io::Error) -> SkipReason {
    match e.kind() {
        ErrorKind::NotFound => SkipReason::Vanished,
        _ => SkipReason::Unreadable(e.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::crawl::{crawl, CrawlOptions};
    use crate::test_support::{put, JPEG, PNG};

    fn only_candidate(root: &Path) -> Candidate {
        let mut found = crawl(root, &CrawlOptions::default()).unwrap().candidates;
        assert_eq!(found.len(), 1);
        found.remove(0)
    }

    const XMP: &[u8] = br#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
        xmlns:dc="http://purl.org/dc/elements/1.1/"><rdf:Description><dc:subject><rdf:Bag>
        <rdf:li>Dusk</rdf:li><rdf:li>pier</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"#;

    #[test]
    fn id_is_a_blake3_prefix() {
        // source: BLAKE3 test vectors (test_vectors.json, input_len 0): the hash of empty
        // input starts af1349b9f5f9a1a6 — quoted from memory.
        assert_eq!(item_id(""), "af1349b9f5f9a1a6");
        assert_eq!(item_id("a/b.jpg").len(), 16);
        assert_ne!(item_id("a/b.jpg"), item_id("a/c.jpg"));
    }

    // A right-to-left override turns `gpj.exe` into what displays as "exe.jpg": the tag is
    // read (nothing a person wrote is dropped) and the scan is told, naming the character.
    #[test]
    fn a_tag_that_would_show_as_something_else_is_reported() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "pic.png", PNG);
        put(root, "pic.txt", "harbour\n\u{202E}gpj.exe\n".as_bytes());
        let read = read_item(root, &only_candidate(root)).unwrap();
        assert_eq!(read.item.tags.len(), 2);
        let said: Vec<&str> = read.notes.iter().map(|n| n.message.as_str()).collect();
        assert_eq!(said.len(), 1, "{said:?}");
        assert!(said[0].contains("U+202E"), "{said:?}");
    }

    #[test]
    fn merges_text_then_xmp_and_hashes_the_picture() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "p/pic.png", PNG);
        put(root, "p/pic.xmp", XMP);
        put(root, "p/pic.txt", b"Harbour\npier\n");
        let candidate = only_candidate(root);
        let read = read_item(root, &candidate).unwrap();
        assert_eq!(read.item.tags, ["harbour", "pier", "dusk"]);
        assert_eq!(read.item.id, item_id("p/pic.png"));
        assert_eq!(read.item.format, ImageFormat::Png);
        assert_eq!(
            read.item.content_hash,
            blake3::hash(PNG).to_hex().to_string()
        );
        assert_eq!(read.item.sidecars, candidate.sidecars);
        assert_eq!(read.notes.len(), 1);
        assert_eq!(
            read.notes[0].message,
            "tags merged from pic.txt and pic.xmp"
        );
        assert!(is_unchanged(&read.item, &candidate));
    }

    #[test]
    fn a_tag_is_an_accepted_suggestion_only_where_no_source_carries_it_unmarked() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "p/pic.png", PNG);
        put(root, "p/pic.xmp", XMP); // carries `pier` and `dusk`, unmarked
        put(
            root,
            "p/pic.txt",
            b"Harbour\nsea # accepted suggestion\ndusk # accepted suggestion\n",
        );
        let read = read_item(root, &only_candidate(root)).unwrap();
        assert_eq!(read.item.tags, ["harbour", "sea", "dusk", "pier"]);
        assert_eq!(read.item.accepted, ["sea"]);
        assert_eq!(read.item.person_tags(), ["harbour", "dusk", "pier"]);
        // Stored without the field when nothing is marked, and read back from such a record.
        let plain = ItemRecord {
            accepted: Vec::new(),
            ..read.item.clone()
        };
        let json = serde_json::to_string(&plain).unwrap();
        assert!(!json.contains("accepted"), "{json}");
        assert_eq!(serde_json::from_str::<ItemRecord>(&json).unwrap(), plain);
    }

    fn embedded_fixture(name: &str) -> Vec<u8> {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("testdata/embedded");
        std::fs::read(dir.join(name)).unwrap()
    }

    // source: testdata/embedded/xmp-exempi.png, written by Exempi 2.6.3 (README there).
    #[test]
    fn embedded_keywords_follow_the_sidecars_with_one_note() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        put(root, "pic.png", &embedded_fixture("xmp-exempi.png"));
        put(root, "pic.txt", b"Naive art\nharbour\n");
        let read = read_item(root, &only_candidate(root)).unwrap();
        assert_eq!(
            read.item.tags,
            ["naive-art", "harbour", "night-boats", "naïve-art"]
        );
        let said: Vec<&str> = read.notes.iter().map(|n| n.message.as_str()).collect();
        assert_eq!(
            said,
            ["tags read from inside the picture (XMP packet)"],
            "{said:?}"
        );
    }

    #[test]
    fn unreadable_embedded_keywords_leave_a_note_not_a_skip() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let mut bytes = embedded_fixture("xmp-exempi.jpg");
        let at = bytes.windows(9).position(|w| w == b"<rdf:RDF ").unwrap();
        bytes[at + 1] = b'!';
        put(root, "pic.jpg", &bytes);
        put(root, "pic.txt", b"pier\n");
        let read = read_item(root, &only_candidate(root)).unwrap();
        // The IPTC copy Exempi wrote beside the packet is still read.
        assert_eq!(
            read.item.tags,
            ["pier", "harbour", "night-boats", "naïve-art"]
        );
        let said: Vec<&str> = read.notes.iter().map(|n| n.message.as_str()).collect();
        assert_eq!(said.len(), 2, "{said:?}");
        assert_eq!(said[0], "tags read from inside the picture (IPTC keywords)");
        assert!(
            said[1].starts_with("keywords inside the picture not read: its XMP packet"),
            "{said:?}"
        );
    }

    // source: testdata/raw/preview.dng, written by tifffile 2026.3.3 with an XMP packet
    // in IFD0 (tag 700); ExifTool 12.57 reads its dc:subject as "tide pool".
    #[test]
    fn camera_raw_is_hashed_whole_and_its_keywords_read() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let bytes =
            std::fs::read(Path::new(env!("CARGO_MANIFEST_DIR")).join("testdata/raw/preview.dng"))
                .unwrap();
        put(root, "reef.dng", &bytes);
        put(root, "reef.txt", b"Rock pool\n");
        let read = read_item(root, &only_candidate(root)).unwrap();
        assert_eq!(read.item.format, ImageFormat::Dng);
        assert_eq!(read.item.tags, ["rock-pool", "tide-pool"]);
        assert_eq!(
            read.item.content_hash,
            blake3::hash(&bytes).to_hex().to_string()
        );
    }

    #[test]
    fn rewritten_embedded_keywords_are_a_change() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let pic = put(root, "pic.png", PNG);
        let record = read_item(root, &only_candidate(root)).unwrap().item;
        assert!(record.tags.is_empty());
        std::fs::write(&pic, embedded_fixture("xmp-exempi.png")).unwrap();
        assert!(!is_unchanged(&record, &only_candidate(root)));
        let record = read_item(root, &only_candidate(root)).unwrap().item;
        assert_eq!(record.tags, ["harbour", "night-boats", "naïve-art"]);
    }

    #[test]
    fn edits_are_changes() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let pic = put(root, "pic.jpg", JPEG);
        let side = put(root, "pic.txt", b"one\n");
        let record = read_item(root, &only_candidate(root)).unwrap().item;
        assert!(is_unchanged(&record, &only_candidate(root)));

        std::fs::write(&side, b"one\ntwo\n").unwrap();
        assert!(
            !is_unchanged(&record, &only_candidate(root)),
            "edited sidecar"
        );
        let record = read_item(root, &only_candidate(root)).unwrap().item;
        assert_eq!(record.tags, ["one", "two"]);

        let earlier = std::time::SystemTime::UNIX_EPOCH + std::time::Duration::from_secs(1_000_000);
        std::fs::File::options()
            .write(true)
            .open(&pic)
            .unwrap()
            .set_modified(earlier)
            .unwrap();
        assert!(
            !is_unchanged(&record, &only_candidate(root)),
            "picture touched"
        );

        std::fs::remove_file(&side).unwrap();
        let record = read_item(root, &only_candidate(root)).unwrap().item;
        assert!(record.tags.is_empty());
        put(root, "pic.xmp", XMP);
        assert!(
            !is_unchanged(&record, &only_candidate(root)),
            "sidecar added"
        );
    }

    #[test]
    fn bad_sidecar_skips_the_whole_item() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let pic = put(root, "pic.jpg", JPEG);
        put(root, "pic.txt", b"fine\n");
        let broken = put(root, "pic.xmp", b"\xff\xfe<\0x\0/\0>\0");
        let skipped = read_item(root, &only_candidate(root)).unwrap_err();
        assert_eq!(skipped.path, pic);
        assert!(
            matches!(&skipped.reason, SkipReason::BadSidecar { sidecar, .. } if *sidecar == broken)
        );
        assert_eq!(skipped.reason.label(), "bad sidecar");
        let message = skipped.to_string();
        assert!(
            message.contains("pic.xmp") && message.contains("UTF-8"),
            "{message}"
        );

        std::fs::write(&broken, b"<rdf:RDF><unclosed></rdf:RDF>").unwrap();
        let message = read_item(root, &only_candidate(root))
            .unwrap_err()
            .to_string();
        assert!(message.contains("not well-formed"), "{message}");
    }

    #[test]
    fn vanished_files_are_reported() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        let pic = put(root, "pic.jpg", JPEG);
        let side = put(root, "pic.txt", b"x");
        let candidate = only_candidate(root);
        std::fs::remove_file(&side).unwrap();
        let skipped = read_item(root, &candidate).unwrap_err();
        assert_eq!((skipped.path, skipped.reason), (side, SkipReason::Vanished));
        std::fs::remove_file(&pic).unwrap();
        let skipped = read_item(root, &candidate).unwrap_err();
        assert_eq!((skipped.path, skipped.reason), (pic, SkipReason::Vanished));
    }
}
