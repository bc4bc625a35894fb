//! Reading the tag files that sit beside pictures.

use std::collections::HashSet;
use std::io::Read;
use std::path::Path;

use crate::error::{CollectionError, MAX_SIDECAR_BYTES, MAX_TEXT_LINE_BYTES};
use crate::item::SidecarKind;

pub use crate::xmp::{
    parse_xmp, parse_xmp_marked, ACCEPTED_PROPERTY, TAGWEAVE_XMP_NAMESPACE, TAGWEAVE_XMP_PREFIX,
};

/// The comment that marks the tags of a plain-text sidecar line as suggestions a person
/// accepted (`sea  # accepted suggestion`). A comment, because every reader of the format
/// already drops comments, so the file stays a plain tag list; on the tag's own line, so the
/// mark goes wherever a person moves, sorts or deletes that line.
pub const ACCEPTED_MARK: &str = "accepted suggestion";

/// A sidecar's tags, and which of them it marks as suggestions a person accepted (the
/// rest a person wrote).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct SidecarTags {
    /// Normalised, de-duplicated, in file order.
    pub tags: Vec<String>,
    /// The tags of `tags` that the file marks, and nowhere carries unmarked.
    pub accepted: Vec<String>,
}

/// Tags of a plain-text sidecar: one per line, commas also separate, `#` comments out the
/// rest of the line. A leading byte-order mark is the file's and is skipped; one anywhere
/// else is dropped from its tag by [`normalize_tag`](crate::normalize_tag).
pub fn parse_text(text: &str) -> Vec<String> {
    dedup_normalized(text_spellings(text))
}

/// Tags of a plain-text sidecar (as [`parse_text`]) and those that only lines marked with
/// [`ACCEPTED_MARK`] carry.
pub fn parse_text_marked(text: &str) -> SidecarTags {
    let body = text.strip_prefix('\u{feff}').unwrap_or(text);
    let (mut marked, mut plain) = (Vec::new(), Vec::new());
    for line in body.lines() {
        let (content, comment) = line.split_once('#').unwrap_or((line, ""));
        if is_accepted_mark(comment) {
            marked.extend(content.split(','));
        } else {
            plain.extend(content.split(','));
        }
    }
    let plain: HashSet<String> = dedup_normalized(plain).into_iter().collect();
    SidecarTags {
        tags: parse_text(text),
        accepted: dedup_normalized(marked)
            .into_iter()
            .filter(|tag| !plain.contains(tag))
            .collect(),
    }
}

/// Whether a line's comment (the text after its first `#`) is [`ACCEPTED_MARK`], in any case.
pub fn is_accepted_mark(comment: &str) -> bool {
    comment.trim().eq_ignore_ascii_case(ACCEPTED_MARK)
}

/// The tags of a plain-text sidecar as written (each piece [`parse_text`] reads, trimmed, in
/// file order, repeats kept, empty pieces left out), for writing a tag back the way the
/// collection spells it.
pub fn text_spellings(text: &str) -> Vec<&str> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    text.lines()
        .flat_map(|line| {
            let content = line.split('#').next().unwrap_or_default();
            content.split(',')
        })
        .map(str::trim)
        .filter(|piece| !piece.is_empty())
        .collect()
}

/// Reads and parses one sidecar, refusing files over [`MAX_SIDECAR_BYTES`] and (plain text)
/// lines over [`MAX_TEXT_LINE_BYTES`]. Every error names the file.
pub fn read_sidecar(path: &Path, kind: SidecarKind) -> Result<SidecarTags, CollectionError> {
    read_limited(path)
        .and_then(|bytes| match kind {
            SidecarKind::Text => {
                if let Some(line) = bytes
                    .split(|&b| b == b'\n')
                    .position(|line| line.len() > MAX_TEXT_LINE_BYTES)
                {
                    return Err(CollectionError::LineTooLong {
                        line: line + 1,
                        limit: MAX_TEXT_LINE_BYTES,
                    });
                }
                utf8_or_line_error(&bytes).map(parse_text_marked)
            }
            SidecarKind::Xmp => parse_xmp_marked(&bytes),
        })
        .map_err(|problem| CollectionError::Sidecar {
            path: path.to_path_buf(),
            problem: Box::new(problem),
        })
}

/// Reads at most one byte past the limit, so a file that grows while we read cannot slip by.
fn read_limited(path: &Path) -> Result<Vec<u8>, CollectionError> {
    let file = std::fs::File::open(path)?;
    let mut bytes = Vec::new();
    file.take(MAX_SIDECAR_BYTES + 1).read_to_end(&mut bytes)?;
    let size = bytes.len() as u64;
    if size > MAX_SIDECAR_BYTES {
        let size = std::fs::metadata(path).map_or(size, |m| m.len());
        return Err(CollectionError::TooLarge {
            size,
            limit: MAX_SIDECAR_BYTES,
        });
    }
    Ok(bytes)
}

/// The bytes as text, or an error giving the 1-based line of the first invalid byte.
pub(crate) fn utf8_or_line_error(bytes: &[u8]) -> Result<&str, CollectionError> {
    std::str::from_utf8(bytes).map_err(|e| {
        let before = &bytes[..e.valid_up_to()];
        CollectionError::NotUtf8 {
            line: 1 + before.iter().filter(|&&b| b == b'\n').count(),
        }
    })
}

/// Normalised tags without repeats, in order of first appearance.
pub(crate) fn dedup_normalized<S: AsRef<str>>(raw: impl IntoIterator<Item = S>) -> Vec<String> {
    let mut seen = HashSet::new();
    raw.into_iter()
        .filter_map(|r| crate::normalize::normalize_tag(r.as_ref()))
        .filter(|tag| seen.insert(tag.clone()))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn text_lines_commas_comments_and_repeats() {
        let text = "Harbour, Boats\n# a whole-line comment\nsunset # golden hour\n\n  old   town \nHARBOUR\n,,\n";
        assert_eq!(parse_text(text), ["harbour", "boats", "sunset", "old-town"]);
    }

    #[test]
    fn text_spellings_are_the_pieces_as_written() {
        let text = "\u{feff}Harbour, Boats\n# note\n  old   town # golden\nHARBOUR\n,,\n";
        assert_eq!(
            text_spellings(text),
            ["Harbour", "Boats", "old   town", "HARBOUR"]
        );
    }

    #[test]
    fn text_tolerates_bom_and_crlf() {
        assert_eq!(parse_text("\u{feff}alpha\r\nBeta\r\n"), ["alpha", "beta"]);
        assert!(parse_text("").is_empty());
        // source: Unicode Character Database name of U+FEFF, ZERO WIDTH NO-BREAK SPACE
        // (the byte-order mark); two files joined leave one at the start of a later line.
        assert_eq!(
            parse_text("\u{feff}harbour\nquay\n\u{feff}harbour, \u{feff}pier\r\n\u{feff}# note\n"),
            ["harbour", "quay", "pier"]
        );
        assert!(parse_text("\u{feff}").is_empty());
        assert!(parse_text("\u{feff}\u{feff}\n").is_empty());
    }

    #[test]
    fn bom_sidecar_file_reads_like_one_without() {
        let dir = tempfile::tempdir().unwrap();
        let with = dir.path().join("with.txt");
        let without = dir.path().join("without.txt");
        std::fs::write(&with, b"\xEF\xBB\xBFharbour\r\nboats\r\n").unwrap();
        std::fs::write(&without, b"harbour\nboats\n").unwrap();
        let read = |p: &Path| read_sidecar(p, SidecarKind::Text).unwrap().tags;
        assert_eq!(read(&with), ["harbour", "boats"]);
        assert_eq!(read(&with), read(&without));
    }

    #[test]
    fn non_utf8_text_names_file_and_line() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("pic.txt");
        std::fs::write(&path, b"fine\ncaf\xe9\n").unwrap();
        let err = read_sidecar(&path, SidecarKind::Text).unwrap_err();
        let message = err.to_string();
        assert!(
            message.contains("pic.txt") && message.contains("line 2"),
            "{message}"
        );
        assert!(message.contains("UTF-8"), "{message}");
    }

    #[test]
    fn oversized_sidecar_and_long_line_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let big = dir.path().join("big.xmp");
        // Sparse file: costs nothing to make.
        std::fs::File::create(&big)
            .unwrap()
            .set_len(MAX_SIDECAR_BYTES + 1)
            .unwrap();
        let err = read_sidecar(&big, SidecarKind::Xmp).unwrap_err();
        assert!(matches!(&err, CollectionError::Sidecar { problem, .. }
            if matches!(**problem, CollectionError::TooLarge { size, .. } if size == MAX_SIDECAR_BYTES + 1)));
        assert!(err.to_string().contains("big.xmp"));

        let long = dir.path().join("long.txt");
        let mut text = b"ok\n".to_vec();
        text.extend(std::iter::repeat_n(b'a', MAX_TEXT_LINE_BYTES + 1));
        std::fs::write(&long, &text).unwrap();
        let err = read_sidecar(&long, SidecarKind::Text)
            .unwrap_err()
            .to_string();
        assert!(err.contains("long.txt") && err.contains("line 2"), "{err}");

        // Exactly at the limit is still accepted.
        std::fs::write(&long, vec![b'a'; MAX_TEXT_LINE_BYTES]).unwrap();
        assert_eq!(
            read_sidecar(&long, SidecarKind::Text).unwrap().tags.len(),
            1
        );
    }

    #[test]
    fn missing_sidecar_names_the_file() {
        let dir = tempfile::tempdir().unwrap();
        let err = read_sidecar(&dir.path().join("gone.txt"), SidecarKind::Text).unwrap_err();
        assert!(err.to_string().contains("gone.txt"));
    }

    #[test]
    fn marked_lines_are_accepted_suggestions_and_still_plain_tags() {
        let text = "# tags, one per line\nHarbour\nSea  # accepted suggestion\n\
                    boats, night-sky # Accepted Suggestion\r\nfog # looked again in 2024\n";
        let read = parse_text_marked(text);
        assert_eq!(read.tags, parse_text(text));
        assert_eq!(read.tags, ["harbour", "sea", "boats", "night-sky", "fog"]);
        assert_eq!(read.accepted, ["sea", "boats", "night-sky"]);
        // A person writing the tag again on a line of their own makes it theirs.
        let claimed = parse_text_marked("sea # accepted suggestion\nSea\n");
        assert_eq!(claimed.tags, ["sea"]);
        assert!(claimed.accepted.is_empty());
    }

    proptest! {
        #[test]
        fn parse_text_never_panics(text in any::<String>()) {
            for tag in parse_text(&text) {
                prop_assert!(!tag.contains(',') && !tag.contains('#') && !tag.contains('\n'));
            }
            let read = parse_text_marked(&text);
            prop_assert!(read.accepted.iter().all(|t| read.tags.contains(t)));
        }
    }
}
