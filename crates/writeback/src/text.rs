//! Editing a plain-text sidecar line by line, leaving every untouched line byte-for-byte.

use std::collections::HashSet;

use tagweave_collection::sidecar::{is_accepted_mark, ACCEPTED_MARK};
use tagweave_collection::{normalize_tag, MAX_TEXT_LINE_BYTES};

use crate::plan::NewTag;

/// First line of a text sidecar this crate creates. A comment keeps the file from ever
/// starting with a tag whose first bytes look like a picture signature (a tag "BMX" starts
/// like a BMP file, and the crawler sniffs content before names).
pub(crate) const NEW_FILE_HEADER: &str = "# tags, one per line\n";

/// Why `tag` cannot be a line of a text sidecar, if it cannot.
pub(crate) fn text_problem(tag: &str) -> Option<&'static str> {
    if tag.contains([',', '#']) {
        Some("text sidecars read `,` and `#` as separators; drop the row, or add the tag to an XMP sidecar by hand")
    } else if tag.contains('\u{feff}') {
        Some("it contains a byte-order mark (U+FEFF); retype the tag")
    } else if tag.len() + 2 > MAX_TEXT_LINE_BYTES {
        Some("it is longer than a text sidecar line may be; shorten it")
    } else {
        None
    }
}

/// The new file contents: lines whose tags are all in `remove` dropped (a line holding other
/// tags or a comment too keeps those), then one line per tag of `add`, in the file's own
/// line-ending style, after a final line end if the file lacked one. An accepted suggestion's
/// line ends with the comment `# accepted suggestion` (`sidecar::ACCEPTED_MARK`).
///
/// A dropped line leaves nothing behind, not even an empty line or its accepted-suggestion
/// mark. Should a dropped first
/// line leave the file starting with text that could pass for a picture signature (a tag
/// "BMX" starts like a BMP file), the comment of [`NEW_FILE_HEADER`] goes first instead.
pub(crate) fn edit_text(before: &str, add: &[NewTag], remove: &HashSet<String>) -> String {
    let (bom, body) = match before.strip_prefix('\u{feff}') {
        Some(rest) => ("\u{feff}", rest),
        None => ("", before),
    };
    let newline = line_ending(body);
    let mut out = String::with_capacity(
        before.len() + add.iter().map(|t| t.spelling.len() + 24).sum::<usize>(),
    );
    out.push_str(bom);
    let mut dropped_first = false;
    for (index, line) in body.split_inclusive('\n').enumerate() {
        let (content, ending) = split_ending(line);
        match strip_tags(content, remove) {
            Kept::Unchanged => out.push_str(line),
            Kept::Rewritten(content) => {
                out.push_str(&content);
                out.push_str(ending);
            }
            Kept::Nothing => dropped_first |= index == 0,
        }
    }
    if dropped_first && bom.is_empty() && starts_like_a_picture(&out) {
        let comment = NEW_FILE_HEADER.trim_end();
        out.insert_str(0, &format!("{comment}{newline}"));
    }
    if !add.is_empty() {
        if out.len() > bom.len() && !out.ends_with('\n') {
            out.push_str(newline);
        }
        for tag in add {
            out.push_str(tag.spelling.trim());
            if tag.suggested {
                out.push_str(" # ");
                out.push_str(ACCEPTED_MARK);
            }
            out.push_str(newline);
        }
    }
    out
}

/// Whether text starts with the first bytes of a picture signature the crawler sniffs
/// (the ones text can hold: BMP `BM`, GIF `GIF8`, RIFF/WebP `RIFF`, TIFF `II*` / `MM`).
fn starts_like_a_picture(text: &str) -> bool {
    ["BM", "GIF8", "RIFF", "II*", "MM"]
        .iter()
        .any(|signature| text.starts_with(signature))
}

/// `\r\n` when the first line ends so, else `\n`.
fn line_ending(text: &str) -> &'static str {
    match text.find('\n') {
        Some(i) if text[..i].ends_with('\r') => "\r\n",
        _ => "\n",
    }
}

fn split_ending(line: &str) -> (&str, &str) {
    if let Some(content) = line.strip_suffix("\r\n") {
        (content, "\r\n")
    } else if let Some(content) = line.strip_suffix('\n') {
        (content, "\n")
    } else {
        (line, "")
    }
}

enum Kept {
    Unchanged,
    Rewritten(String),
    /// No tag and no comment left: the line goes.
    Nothing,
}

/// The line without the pieces (between commas, before any `#`) that normalise into `remove`.
fn strip_tags(content: &str, remove: &HashSet<String>) -> Kept {
    if remove.is_empty() {
        return Kept::Unchanged;
    }
    let (data, comment) = content.split_at(content.find('#').unwrap_or(content.len()));
    let doomed = |piece: &str| normalize_tag(piece).is_some_and(|t| remove.contains(&t));
    let pieces: Vec<&str> = data.split(',').collect();
    if !pieces.iter().any(|p| doomed(p)) {
        return Kept::Unchanged;
    }
    let kept: Vec<&str> = pieces.iter().copied().filter(|p| !doomed(p)).collect();
    if kept.iter().all(|p| normalize_tag(p).is_none()) {
        let mark_only = comment.strip_prefix('#').is_some_and(is_accepted_mark);
        return if comment.is_empty() || mark_only {
            Kept::Nothing
        } else {
            Kept::Rewritten(comment.to_string())
        };
    }
    let mut joined = kept.join(",");
    if doomed(pieces[0]) {
        joined = joined.trim_start().to_string();
    }
    if let Some(last) = pieces.last().filter(|p| doomed(p)) {
        // Keep the space that stood before a comment.
        let trailing = &last[last.trim_end().len()..];
        joined = format!("{}{trailing}", joined.trim_end());
    }
    joined.push_str(comment);
    Kept::Rewritten(joined)
}

#[cfg(test)]
mod tests {
    use super::*;
    use tagweave_collection::sidecar::parse_text;

    fn set(tags: &[&str]) -> HashSet<String> {
        tags.iter().map(|t| t.to_string()).collect()
    }

    fn adds(tags: &[&str]) -> Vec<NewTag> {
        NewTag::all(tags, false)
    }

    #[test]
    fn accepted_suggestions_carry_their_mark_and_lose_it_with_the_tag() {
        let mut add = NewTag::all(&["Sea"], true);
        add.extend(NewTag::all(&["pier"], false));
        let after = edit_text("harbour\r\n", &add, &set(&[]));
        // by hand: the file's own line ends; the mark on the accepted suggestion's line only.
        assert_eq!(after, "harbour\r\nSea # accepted suggestion\r\npier\r\n");
        let read = tagweave_collection::sidecar::parse_text_marked(&after);
        assert_eq!(read.tags, ["harbour", "sea", "pier"]);
        assert_eq!(read.accepted, ["sea"]);
        // Removing the tag takes its mark along; another comment would stay.
        assert_eq!(
            edit_text(&after, &[], &set(&["sea"])),
            "harbour\r\npier\r\n"
        );
        assert_eq!(
            edit_text(
                "a # Accepted Suggestion\nb # seen twice\n",
                &[],
                &set(&["a", "b"])
            ),
            "# seen twice\n"
        );
    }

    #[test]
    fn appends_in_lf_style() {
        // by hand: two new lines after the existing ones, nothing else touched.
        assert_eq!(
            edit_text("cliffs\nday\n", &adds(&["Old Town", "gull"]), &set(&[])),
            "cliffs\nday\nOld Town\ngull\n"
        );
    }

    #[test]
    fn keeps_crlf_and_adds_missing_final_newline() {
        // by hand: the CRLF style of the first line is kept for the new lines.
        assert_eq!(
            edit_text("a\r\nb", &adds(&["c"]), &set(&[])),
            "a\r\nb\r\nc\r\n"
        );
        assert_eq!(edit_text("a", &adds(&["c"]), &set(&[])), "a\nc\n");
        assert_eq!(edit_text("", &adds(&["c"]), &set(&[])), "c\n");
        assert_eq!(
            edit_text("\u{feff}", &adds(&["c"]), &set(&[])),
            "\u{feff}c\n"
        );
    }

    #[test]
    fn removes_only_matching_pieces() {
        let before = "Harbour, Boats # golden hour\nold  town\r\nkeep\nOLD TOWN\nboats\n";
        let after = edit_text(before, &[], &set(&["boats", "old-town"]));
        // by hand: "Boats" leaves its line (the comment stays), both spellings of old town
        // go, the untouched lines stay byte-for-byte.
        assert_eq!(after, "Harbour # golden hour\nkeep\n");
        assert_eq!(parse_text(&after), ["harbour", "keep"]);
    }

    #[test]
    fn removing_the_first_line_leaves_no_empty_line() {
        assert_eq!(edit_text("gone\nday\n", &[], &set(&["gone"])), "day\n");
        assert_eq!(edit_text("a\ngone\nb\n", &[], &set(&["gone"])), "a\nb\n");
        assert_eq!(
            edit_text("gone\r\nday\r\n", &[], &set(&["gone"])),
            "day\r\n"
        );
        assert_eq!(edit_text("gone\n", &[], &set(&["gone"])), "");
        // a file never starts with what could pass for a picture signature
        assert_eq!(
            edit_text("gone\nBMX\n", &[], &set(&["gone"])),
            "# tags, one per line\nBMX\n"
        );
        assert_eq!(
            edit_text("gone\r\nGIF89a\r\n", &[], &set(&["gone"])),
            "# tags, one per line\r\nGIF89a\r\n"
        );
        assert_eq!(
            edit_text("gone # why\nx\n", &[], &set(&["gone"])),
            "# why\nx\n"
        );
        assert_eq!(edit_text("a, gone, b\n", &[], &set(&["gone"])), "a, b\n");
        assert_eq!(edit_text("gone, b\n", &[], &set(&["gone"])), "b\n");
    }

    #[test]
    fn separators_cannot_be_written() {
        assert!(text_problem("rock, roll").is_some());
        assert!(text_problem("#1").is_some());
        assert!(text_problem("caf\u{e9} & bar <x>").is_none());
    }
}
