//! The review sheet: a CSV file a person opens in any spreadsheet, fills in, and hands back.
//!
//! Columns, in this order when written: `picture`, `tag`, `probability`, `kind`, `accept`.
//! Reading accepts them in any order, ignores extra columns, and also accepts `;` or tab as the
//! separator (what spreadsheets in many locales save), with `,` as a decimal mark.

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::path::Path;

use tagweave_collection::normalize_tag;

use crate::atomic::{write_atomically, Mode};
use crate::error::WritebackError;

/// Header names, in the order they are written.
pub const COLUMNS: [&str; 5] = ["picture", "tag", "probability", "kind", "accept"];

/// A leading apostrophe is put before a cell that starts with one of these, so a spreadsheet
/// shows it as text instead of running it as a formula (`=`, `+`, `-`, `@`, tab, carriage
/// return: the characters spreadsheets treat as the start of a formula). A cell that already
/// starts with an apostrophe gets one more, so reading can always take exactly one off.
const FORMULA_STARTS: [char; 7] = ['=', '+', '-', '@', '\t', '\r', '\''];

/// What the model says about a tag on a picture.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum RowKind {
    /// The model proposes adding a tag the picture does not carry.
    Suggested,
    /// The picture carries the tag but the model doubts it.
    Disputed,
    /// A picture proposed for tagging by hand: the person types its tags into the `tag`
    /// cell (several separated by `,` or `;`); a typed tag is the decision, `accept` is not
    /// needed. Left empty, the row changes nothing.
    ToTag,
}

impl RowKind {
    /// The word used in the `kind` column.
    pub fn as_str(self) -> &'static str {
        match self {
            RowKind::Suggested => "suggested",
            RowKind::Disputed => "disputed",
            RowKind::ToTag => "to-tag",
        }
    }
}

/// What the person wrote in the `accept` column.
///
/// | cell | suggested row | disputed row |
/// |---|---|---|
/// | empty | nothing | nothing |
/// | `y`, `yes` | the tag is added | the tag is kept: nothing changes |
/// | `n`, `no` | nothing | nothing: the tag stays (removing needs `remove`) |
/// | `remove` | not allowed | the tag is removed |
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default)]
pub enum Decision {
    #[default]
    Undecided,
    Accept,
    Reject,
    /// Only on disputed rows: a tag is taken away only when a person says so in words.
    Remove,
}

impl Decision {
    /// The word written in the `accept` column.
    pub fn as_cell(self) -> &'static str {
        match self {
            Decision::Undecided => "",
            Decision::Accept => "y",
            Decision::Reject => "n",
            Decision::Remove => "remove",
        }
    }
}

/// One line of the sheet.
#[derive(Debug, Clone, PartialEq)]
pub struct SheetRow {
    /// Relative to the collection root, `/`-separated (as the crawler names it).
    pub picture: String,
    pub tag: String,
    /// From 0 to 1; written with 3 decimals.
    pub probability: Option<f32>,
    pub kind: RowKind,
    pub decision: Decision,
}

/// The tags to add to and remove from one picture.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct TagChange {
    pub picture: String,
    /// Tags a person wrote. Spellings as in the sheet; one per normalised tag, sorted by
    /// normalised tag.
    pub add: Vec<String>,
    /// Suggestions a person accepted: added like `add`, and marked in the sidecar as accepted
    /// suggestions. Spellings as in the sheet; one per normalised tag, sorted by normalised tag.
    pub accept: Vec<String>,
    /// Spellings as in the sheet; one per normalised tag, sorted by normalised tag.
    pub remove: Vec<String>,
}

/// Writes the sheet atomically (UTF-8 with a byte-order mark so spreadsheets detect the
/// encoding, CRLF line ends as RFC 4180 asks, formula-looking cells guarded by an apostrophe).
pub fn write_sheet(path: &Path, rows: &[SheetRow]) -> Result<(), WritebackError> {
    let bytes = render_sheet(rows)?;
    let permissions = std::fs::metadata(path).ok().map(|m| m.permissions());
    write_atomically(path, &bytes, Mode::Replace, permissions, &|| Ok(()))
}

/// Writes a fresh sheet at `path` without losing what a person typed into the one already
/// there: each decided row of the old sheet gives its decision to the new row for the same
/// picture, tag and kind, and a decided row the new sheet no longer lists is kept at its end.
/// An old sheet that cannot be read is left alone (an error: it may hold decisions).
pub fn write_sheet_keeping_decisions(
    path: &Path,
    rows: &[SheetRow],
) -> Result<SheetWritten, WritebackError> {
    let old = match std::fs::symlink_metadata(path) {
        Ok(_) => read_sheet(path).map_err(|e| WritebackError::Sheet {
            path: path.to_path_buf(),
            problem: format!(
                "already exists and cannot be read as a review sheet, so it was left as it is \
                 (it may hold decisions): apply it, move it away, or name another sheet \
                 ({e})"
            ),
        })?,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Vec::new(),
        Err(e) => {
            return Err(WritebackError::Sheet {
                path: path.to_path_buf(),
                problem: format!("cannot be checked for decisions already typed in ({e})"),
            })
        }
    };
    let (merged, kept_decisions) = keep_decisions(&old, rows);
    write_sheet(path, &merged)?;
    Ok(SheetWritten {
        rows: merged.len(),
        kept_decisions,
    })
}

/// What [`write_sheet_keeping_decisions`] wrote.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SheetWritten {
    pub rows: usize,
    /// Decisions a person had typed into the sheet already, carried into the new one.
    pub kept_decisions: usize,
}

/// `fresh` with the decisions of `old` carried over (same picture, normalised tag, kind),
/// followed by the decided rows of `old` that `fresh` lacks; and the number of decisions kept.
fn keep_decisions(old: &[SheetRow], fresh: &[SheetRow]) -> (Vec<SheetRow>, usize) {
    let key = |r: &SheetRow| (r.picture.clone(), normalize_tag(&r.tag), r.kind);
    let mut decided: BTreeMap<_, &SheetRow> = BTreeMap::new();
    for row in old.iter().filter(|r| r.decision != Decision::Undecided) {
        decided.entry(key(row)).or_insert(row);
    }
    let kept = decided.len();
    let mut out: Vec<SheetRow> = fresh
        .iter()
        .map(|row| match decided.remove(&key(row)) {
            Some(person) => SheetRow {
                decision: person.decision,
                ..row.clone()
            },
            None => row.clone(),
        })
        .collect();
    let left = old
        .iter()
        .filter(|r| decided.get(&key(r)).is_some_and(|d| std::ptr::eq(*d, *r)));
    out.extend(left.cloned());
    (out, kept)
}

/// The bytes [`write_sheet`] writes.
pub fn render_sheet(rows: &[SheetRow]) -> Result<Vec<u8>, WritebackError> {
    let mut out = "\u{feff}".as_bytes().to_vec();
    {
        let mut writer = csv::WriterBuilder::new()
            .terminator(csv::Terminator::CRLF)
            .from_writer(&mut out);
        let csv_error = |e: csv::Error| WritebackError::SheetRow {
            picture: String::new(),
            problem: e.to_string(),
        };
        writer.write_record(COLUMNS).map_err(csv_error)?;
        for row in rows {
            let bad = |problem: String| WritebackError::SheetRow {
                picture: row.picture.clone(),
                problem,
            };
            let probability = match row.probability {
                None => String::new(),
                Some(p) if p.is_finite() && (0.0..=1.0).contains(&p) => format!("{p:.3}"),
                Some(p) => return Err(bad(format!("probability {p} is not between 0 and 1"))),
            };
            if row.kind == RowKind::Suggested && row.decision == Decision::Remove {
                return Err(bad(format!(
                    "tag `{}`: `remove` applies to disputed rows only",
                    row.tag
                )));
            }
            writer
                .write_record([
                    guard(&row.picture).as_ref(),
                    guard(&row.tag).as_ref(),
                    &probability,
                    row.kind.as_str(),
                    row.decision.as_cell(),
                ])
                .map_err(csv_error)?;
        }
        writer.flush().map_err(|e| csv_error(csv::Error::from(e)))?;
    }
    Ok(out)
}

/// Reads a filled-in sheet. Every problem names the sheet and the line.
pub fn read_sheet(path: &Path) -> Result<Vec<SheetRow>, WritebackError> {
    let bytes = std::fs::read(path).map_err(|e| WritebackError::Sheet {
        path: path.to_path_buf(),
        problem: format!("cannot be read ({e}); check the path"),
    })?;
    parse_sheet(path, &bytes)
}

/// Parses sheet bytes; `path` is only used in messages.
pub fn parse_sheet(path: &Path, bytes: &[u8]) -> Result<Vec<SheetRow>, WritebackError> {
    let bytes = bytes.strip_prefix("\u{feff}".as_bytes()).unwrap_or(bytes);
    let sheet_error = |problem: String| WritebackError::Sheet {
        path: path.to_path_buf(),
        problem,
    };
    let line_error = |line: u64, problem: String| WritebackError::SheetLine {
        path: path.to_path_buf(),
        line,
        problem,
    };
    let csv_error = |e: csv::Error| {
        let line = e.position().map_or(1, |p| line_of(bytes, p));
        let problem = match e.kind() {
            csv::ErrorKind::Utf8 { .. } => {
                "is not UTF-8 text; save the sheet as \"CSV UTF-8\"".to_string()
            }
            _ => format!("is not valid CSV ({e})"),
        };
        line_error(line, problem)
    };

    let (delimiter, columns) = find_header(bytes).map_err(sheet_error)?;
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .delimiter(delimiter)
        .from_reader(bytes);
    let mut rows = Vec::new();
    for record in reader.byte_records() {
        let record = record.map_err(csv_error)?;
        let line = record.position().map_or(0, |p| line_of(bytes, p));
        let bad = |problem: String| line_error(line, problem);
        // Decoded here rather than by the csv reader, whose UTF-8 errors lack the line.
        let record = csv::StringRecord::from_byte_record(record)
            .map_err(|_| bad("is not UTF-8 text; save the sheet as \"CSV UTF-8\"".into()))?;
        if record.iter().all(|cell| cell.trim().is_empty()) {
            continue;
        }
        let cell = |column: usize| record.get(columns[column]).unwrap_or("");

        let picture = unguard(cell(0)).to_string();
        if picture.trim().is_empty() {
            return Err(bad(
                "the `picture` cell is empty; copy it back from the sheet as written".into(),
            ));
        }
        let tag = unguard(cell(1).trim()).trim().to_string();
        let probability = parse_probability(cell(2)).map_err(&bad)?;
        let kind = match cell(3).trim().to_lowercase().as_str() {
            "suggested" => RowKind::Suggested,
            "disputed" => RowKind::Disputed,
            "to-tag" => RowKind::ToTag,
            other => {
                return Err(bad(format!(
                    "`kind` is `{other}`; allowed values: suggested, disputed, to-tag"
                )))
            }
        };
        if let Some(c) = tagweave_collection::misleading_char(&tag) {
            return Err(bad(format!(
                "the `tag` cell holds U+{:04X}, a character that makes text show as something \
                 else (or none at all); retype the tag",
                c as u32
            )));
        }
        if kind == RowKind::ToTag {
            // Each typed tag is a row of its own, decided: the person wrote it.
            rows.extend(
                tag.split([',', ';'])
                    .map(str::trim)
                    .filter(|t| normalize_tag(t).is_some())
                    .map(|t| SheetRow {
                        picture: picture.clone(),
                        tag: t.to_string(),
                        probability: None,
                        kind,
                        decision: Decision::Accept,
                    }),
            );
            continue;
        }
        if normalize_tag(&tag).is_none() {
            return Err(bad(
                "the `tag` cell is empty; fill it in or delete the row".into()
            ));
        }
        let decision = parse_decision(cell(4), kind).map_err(&bad)?;
        rows.push(SheetRow {
            picture,
            tag,
            probability,
            kind,
            decision,
        });
    }
    Ok(rows)
}

/// Groups the decided rows per picture: accepted suggestions are added (marked as such),
/// tags typed into `to-tag` rows are added (a person's own), disputed tags marked `remove`
/// are removed, everything else changes nothing. Sorted by picture, each list sorted
/// and de-duplicated under [`normalize_tag`]. A tag both kept/added and removed for one picture
/// is an error, never guessed at.
pub fn changes_from_sheet(rows: &[SheetRow]) -> Result<Vec<TagChange>, WritebackError> {
    #[derive(Default)]
    struct Wish {
        spelling: String,
        add: bool,
        accept: bool,
        keep: bool,
        remove: bool,
    }
    let mut pictures: BTreeMap<&str, BTreeMap<String, Wish>> = BTreeMap::new();
    for row in rows {
        if row.kind == RowKind::ToTag && normalize_tag(&row.tag).is_none() {
            continue; // a picture proposed for tagging that nobody has tagged yet
        }
        let Some(normal) = normalize_tag(&row.tag) else {
            return Err(WritebackError::SheetRow {
                picture: row.picture.clone(),
                problem: "a row has an empty tag".into(),
            });
        };
        let wish = pictures
            .entry(&row.picture)
            .or_default()
            .entry(normal)
            .or_insert_with(|| Wish {
                spelling: row.tag.trim().to_string(),
                ..Wish::default()
            });
        match (row.kind, row.decision) {
            (RowKind::Suggested, Decision::Accept) => wish.accept = true,
            (RowKind::ToTag, Decision::Accept) => wish.add = true,
            (RowKind::Disputed, Decision::Accept) => wish.keep = true,
            (RowKind::Disputed, Decision::Remove) => wish.remove = true,
            (RowKind::Suggested, Decision::Remove) => {
                return Err(WritebackError::SheetRow {
                    picture: row.picture.clone(),
                    problem: format!("tag `{}`: `remove` applies to disputed rows only", row.tag),
                })
            }
            _ => {}
        }
    }
    let mut changes = Vec::new();
    for (picture, wishes) in pictures {
        let mut change = TagChange {
            picture: picture.to_string(),
            ..TagChange::default()
        };
        for (normal, wish) in wishes {
            if wish.remove && (wish.add || wish.accept || wish.keep) {
                return Err(WritebackError::Conflict {
                    picture: picture.to_string(),
                    tag: normal,
                });
            }
            // A tag a person typed is theirs, even where it was also suggested.
            if wish.add {
                change.add.push(wish.spelling);
            } else if wish.accept {
                change.accept.push(wish.spelling);
            } else if wish.remove {
                change.remove.push(wish.spelling);
            }
        }
        if !change.add.is_empty() || !change.accept.is_empty() || !change.remove.is_empty() {
            changes.push(change);
        }
    }
    Ok(changes)
}

fn guard(cell: &str) -> Cow<'_, str> {
    if cell.starts_with(FORMULA_STARTS) {
        Cow::Owned(format!("'{cell}"))
    } else {
        Cow::Borrowed(cell)
    }
}

/// Undoes [`guard`]. An apostrophe before anything else is left alone, so a spreadsheet that
/// drops the guard on saving (it treats the apostrophe as "text follows") reads back the same.
fn unguard(cell: &str) -> &str {
    match cell.strip_prefix('\'') {
        Some(rest) if rest.starts_with(FORMULA_STARTS) => rest,
        _ => cell,
    }
}

/// The line (counted from 1) on which the record at `position` starts. The csv reader's own
/// line count is one short after CRLF line ends (the ends sheets are written with), and its
/// byte offset can point at the end of the line before; so: the line of the first byte from
/// there on that is not a line end.
fn line_of(bytes: &[u8], position: &csv::Position) -> u64 {
    let start = usize::try_from(position.byte())
        .unwrap_or(usize::MAX)
        .min(bytes.len());
    let first = bytes[start..]
        .iter()
        .position(|&b| b != b'\r' && b != b'\n')
        .map_or(bytes.len(), |i| start + i);
    1 + bytes[..first].iter().filter(|&&b| b == b'\n').count() as u64
}

/// The delimiter whose first record names all five columns, and each column's position.
fn find_header(bytes: &[u8]) -> Result<(u8, [usize; 5]), String> {
    let mut first_try = None;
    for delimiter in [b',', b';', b'\t'] {
        let mut reader = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .delimiter(delimiter)
            .from_reader(bytes);
        let header = match reader.records().next() {
            None => return Err("is empty; it needs a header line and one row per tag".into()),
            Some(Err(e)) => {
                return Err(format!(
                    "the header line cannot be read ({e}); save the sheet as \"CSV UTF-8\""
                ))
            }
            Some(Ok(header)) => header,
        };
        let names: Vec<String> = header.iter().map(|h| h.trim().to_lowercase()).collect();
        let mut columns = [0; 5];
        let mut missing = Vec::new();
        for (slot, wanted) in columns.iter_mut().zip(COLUMNS) {
            match names.iter().position(|n| n == wanted) {
                Some(i) => *slot = i,
                None => missing.push(wanted),
            }
        }
        if missing.is_empty() {
            return Ok((delimiter, columns));
        }
        first_try.get_or_insert((names, missing));
    }
    let (names, missing) = first_try.unwrap_or_default();
    Err(format!(
        "the header line must name the columns {}; missing: {} (found: {}); \
         copy the header line back from the sheet as written",
        COLUMNS.join(", "),
        missing.join(", "),
        names.join(", ")
    ))
}

fn parse_probability(cell: &str) -> Result<Option<f32>, String> {
    let text = cell.trim();
    if text.is_empty() {
        return Ok(None);
    }
    let (number, scale) = match text.strip_suffix('%') {
        Some(n) => (n.trim(), 100.0),
        None => (text, 1.0),
    };
    number
        .replace(',', ".")
        .parse::<f32>()
        .ok()
        .map(|p| p / scale)
        .filter(|p| (0.0..=1.0).contains(p))
        .map(Some)
        .ok_or_else(|| {
            format!("`probability` is `{text}`; it must be a number from 0 to 1, or empty")
        })
}

fn parse_decision(cell: &str, kind: RowKind) -> Result<Decision, String> {
    let decision = match cell.trim().to_lowercase().as_str() {
        "" => Decision::Undecided,
        "y" | "yes" => Decision::Accept,
        "n" | "no" => Decision::Reject,
        "remove" if kind == RowKind::Disputed => Decision::Remove,
        "remove" => {
            return Err(
                "`accept` is `remove` on a suggested row; `remove` applies to disputed rows \
                 only (a suggested tag is not on the picture); use y, n or leave it empty"
                    .into(),
            )
        }
        _ => {
            return Err(format!(
                "`accept` is `{}`; allowed values: y, yes, n, no, remove (disputed rows only), \
                 or empty",
                cell.trim()
            ))
        }
    };
    Ok(decision)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn a_tag_that_would_show_as_something_else_is_refused_with_its_line() {
        let text = "picture,tag,probability,kind,accept\na.jpg,sea,,suggested,y\nb.jpg,\u{202E}gpj.exe,,suggested,y\n";
        let e = parse_sheet(Path::new("s.csv"), text.as_bytes())
            .unwrap_err()
            .to_string();
        assert!(e.contains("line 3") && e.contains("U+202E"), "{e}");
    }

    // A picture proposed for tagging by hand: the person typed two tags into one cell of
    // one row and left another row empty. Separators `,` and `;` as the row kind documents.
    #[test]
    fn tags_typed_into_a_to_tag_row_are_added_and_an_empty_row_changes_nothing() {
        let text = "picture,tag,probability,kind,accept\r\n\
                    a.jpg,\"Harbour, night ;dusk\",,to-tag,\r\n\
                    b.jpg,,,to-tag,\r\n";
        let rows = parse_sheet(Path::new("s.csv"), text.as_bytes()).unwrap();
        let typed: Vec<(&str, &str)> = rows
            .iter()
            .map(|r| (r.picture.as_str(), r.tag.as_str()))
            .collect();
        assert_eq!(
            typed,
            [("a.jpg", "Harbour"), ("a.jpg", "night"), ("a.jpg", "dusk")]
        );
        assert!(rows
            .iter()
            .all(|r| r.kind == RowKind::ToTag && r.decision == Decision::Accept));
        let changes = changes_from_sheet(&rows).unwrap();
        assert_eq!(changes.len(), 1);
        assert_eq!(changes[0].add, ["dusk", "Harbour", "night"]);
        assert!(changes[0].remove.is_empty());
        // Written back (an empty to-tag row included) and read again, nothing is lost.
        let mut written = rows.clone();
        written.push(SheetRow {
            picture: "b.jpg".into(),
            tag: String::new(),
            probability: None,
            kind: RowKind::ToTag,
            decision: Decision::Undecided,
        });
        let bytes = render_sheet(&written).unwrap();
        assert_eq!(parse_sheet(Path::new("s.csv"), &bytes).unwrap(), rows);
        assert_eq!(changes_from_sheet(&written).unwrap(), changes);
    }

    // A person typed `remove` into row 2 and `y` into a row the new run no longer lists:
    // both survive a fresh sheet, the first on the new row (with its new probability), the
    // second at the end; undecided old rows simply give way.
    #[test]
    fn a_fresh_sheet_keeps_every_decision_typed_into_the_old_one() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("review.csv");
        let old = [
            row("a.jpg", "sea", RowKind::Suggested, Decision::Undecided),
            row("a.jpg", "Snow", RowKind::Disputed, Decision::Remove),
            row("b.jpg", "boat", RowKind::Suggested, Decision::Accept),
        ];
        write_sheet(&path, &old).unwrap();
        let mut fresh = vec![
            row("a.jpg", "snow", RowKind::Disputed, Decision::Undecided),
            row("c.jpg", "dusk", RowKind::Suggested, Decision::Undecided),
        ];
        fresh[0].probability = Some(0.02);
        let written = write_sheet_keeping_decisions(&path, &fresh).unwrap();
        assert_eq!(
            written,
            SheetWritten {
                rows: 3,
                kept_decisions: 2
            }
        );
        let back = read_sheet(&path).unwrap();
        let mut want = vec![
            row("a.jpg", "snow", RowKind::Disputed, Decision::Remove),
            row("c.jpg", "dusk", RowKind::Suggested, Decision::Undecided),
            row("b.jpg", "boat", RowKind::Suggested, Decision::Accept),
        ];
        want[0].probability = Some(0.02);
        assert_eq!(back, want);
        // the same again changes nothing
        write_sheet_keeping_decisions(&path, &fresh).unwrap();
        assert_eq!(read_sheet(&path).unwrap(), want);
    }

    #[test]
    fn an_unreadable_old_sheet_is_left_untouched() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("review.csv");
        std::fs::write(&path, "my notes, not a sheet\n").unwrap();
        let fresh = [row("a.jpg", "sea", RowKind::Suggested, Decision::Undecided)];
        let error = write_sheet_keeping_decisions(&path, &fresh).unwrap_err();
        assert!(error.to_string().contains("left as it is"), "{error}");
        assert_eq!(std::fs::read(&path).unwrap(), b"my notes, not a sheet\n");
    }

    fn row(picture: &str, tag: &str, kind: RowKind, decision: Decision) -> SheetRow {
        SheetRow {
            picture: picture.into(),
            tag: tag.into(),
            probability: None,
            kind,
            decision,
        }
    }

    fn parse(text: &str) -> Result<Vec<SheetRow>, WritebackError> {
        parse_sheet(Path::new("review.csv"), text.as_bytes())
    }

    #[test]
    fn writes_rfc4180_with_guarded_formulas() {
        let rows = [
            SheetRow {
                probability: Some(0.25),
                ..row(
                    "1950s/a b.png",
                    "say \"hi\", ok",
                    RowKind::Suggested,
                    Decision::Undecided,
                )
            },
            row("x,y.png", "=SUM(A1)", RowKind::Disputed, Decision::Remove),
            row("c.png", "two\nlines", RowKind::Suggested, Decision::Accept),
        ];
        let text = String::from_utf8(render_sheet(&rows).unwrap()).unwrap();
        // source: RFC 4180 section 2 — CRLF line breaks (rule 1), a header line (rule 3),
        // fields holding commas, quotes or line breaks enclosed in double quotes (rule 6), a
        // quote inside doubled (rule 7). By hand: the formula guard is a leading apostrophe.
        assert_eq!(
            text,
            "\u{feff}picture,tag,probability,kind,accept\r\n\
             1950s/a b.png,\"say \"\"hi\"\", ok\",0.250,suggested,\r\n\
             \"x,y.png\",'=SUM(A1),,disputed,remove\r\n\
             c.png,\"two\nlines\",,suggested,y\r\n"
        );
        assert_eq!(parse(&text).unwrap(), rows);
    }

    #[test]
    fn refuses_rows_it_could_not_read_back() {
        let bad_probability = SheetRow {
            probability: Some(1.5),
            ..row("a.png", "kelp", RowKind::Suggested, Decision::Undecided)
        };
        assert!(render_sheet(&[bad_probability]).is_err());
        let remove_suggested = row("a.png", "kelp", RowKind::Suggested, Decision::Remove);
        assert!(render_sheet(&[remove_suggested]).is_err());
    }

    #[test]
    fn reads_leniently() {
        // Any column order, extra columns, header case and spaces, `;` separator with decimal
        // commas (as spreadsheets in many locales save), blank lines, accept in any case.
        let text = "\u{feff}Kind; Accept ;note;TAG;Picture;probability\r\n\
                    suggested; YES ;x;Kelp;a.png;0,875\r\n\
                    ;;;;;\r\n\
                    disputed;Remove;;gull;b.png;12.5%\r\n\
                    disputed;;;dawn;b.png;\r\n";
        let rows = parse(text).unwrap();
        assert_eq!(
            rows,
            [
                SheetRow {
                    probability: Some(0.875),
                    ..row("a.png", "Kelp", RowKind::Suggested, Decision::Accept)
                },
                SheetRow {
                    probability: Some(0.125),
                    ..row("b.png", "gull", RowKind::Disputed, Decision::Remove)
                },
                row("b.png", "dawn", RowKind::Disputed, Decision::Undecided),
            ]
        );
    }

    #[test]
    fn bad_accept_value_names_sheet_line_and_allowed_values() {
        // Line 3 holds a quoted line break, so the bad row starts on line 4.
        let text = "picture,tag,probability,kind,accept\n\
                    a.png,\"two\nlines\",0.5,suggested,y\n\
                    b.png,kelp,,disputed,maybe\n";
        let message = parse(text).unwrap_err().to_string();
        assert!(message.contains("review.csv"), "{message}");
        assert!(message.contains("line 4"), "{message}");
        assert!(message.contains("`maybe`"), "{message}");
        assert!(message.contains("y, yes, n, no, remove"), "{message}");

        let remove_on_suggested =
            "picture,tag,probability,kind,accept\na.png,kelp,,suggested,remove\n";
        let message = parse(remove_on_suggested).unwrap_err().to_string();
        assert!(
            message.contains("line 2") && message.contains("disputed rows only"),
            "{message}"
        );

        let bad_kind = "picture,tag,probability,kind,accept\na.png,kelp,,maybe,\n";
        let message = parse(bad_kind).unwrap_err().to_string();
        assert!(
            message.contains("line 2") && message.contains("suggested, disputed"),
            "{message}"
        );

        let bad_probability = "picture,tag,probability,kind,accept\na.png,kelp,high,suggested,\n";
        assert!(parse(bad_probability)
            .unwrap_err()
            .to_string()
            .contains("`high`"));
    }

    #[test]
    fn errors_name_the_line_whatever_the_line_ends() {
        // Line 4 of each: the sheet's own CRLF ends, bare LF, and a blank line before it.
        for text in [
            "picture,tag,probability,kind,accept\r\na.png,kelp,,suggested,y\r\n\
             b.png,kelp,,suggested,\r\nc.png,kelp,,suggested,maybe\r\n",
            "picture,tag,probability,kind,accept\na.png,kelp,,suggested,y\n\
             b.png,kelp,,suggested,\nc.png,kelp,,suggested,maybe\n",
            "picture,tag,probability,kind,accept\r\na.png,kelp,,suggested,y\r\n\
             \r\nc.png,kelp,,suggested,maybe\r\n",
        ] {
            let message = parse(text).unwrap_err().to_string();
            assert!(message.contains("line 4:"), "{message:?} for {text:?}");
        }
        let with_bom = "\u{feff}picture,tag,probability,kind,accept\r\na.png,kelp,,maybe,\r\n";
        let message = parse(with_bom).unwrap_err().to_string();
        assert!(message.contains("line 2:"), "{message}");
    }

    #[test]
    fn header_must_name_the_five_columns() {
        let message = parse("picture,tag,kind\na.png,kelp,suggested\n")
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("missing: probability, accept"),
            "{message}"
        );
        assert!(parse("").unwrap_err().to_string().contains("empty"));
        let not_utf8 = b"picture,tag,probability,kind,accept\na.png,caf\xe9,,suggested,\n";
        let message = parse_sheet(Path::new("s.csv"), not_utf8)
            .unwrap_err()
            .to_string();
        assert!(
            message.contains("line 2") && message.contains("UTF-8"),
            "{message}"
        );
    }

    #[test]
    fn changes_group_sort_and_dedupe() {
        use Decision::*;
        use RowKind::*;
        let rows = [
            row("b.png", "Zebra", Suggested, Accept),
            row("b.png", "kelp", Suggested, Accept),
            row("b.png", "KELP ", Suggested, Accept),
            row("b.png", "gull", Disputed, Remove),
            row("a.png", "dawn", Disputed, Accept),
            row("a.png", "dusk", Disputed, Reject),
            row("a.png", "fog", Suggested, Reject),
            row("a.png", "mist", Suggested, Undecided),
            row("c.png", "old  town", Disputed, Remove),
            row("d.png", "pier", ToTag, Accept),
            row("d.png", "Sea", Suggested, Accept),
            row("d.png", "sea", ToTag, Accept),
        ];
        // by hand: y/n on disputed rows change nothing, so a.png has no change at all; a
        // suggestion accepted is an accepted suggestion, a tag typed in is a person's own,
        // and typing a suggested tag makes it the person's.
        assert_eq!(
            changes_from_sheet(&rows).unwrap(),
            [
                TagChange {
                    picture: "b.png".into(),
                    add: vec![],
                    accept: vec!["kelp".into(), "Zebra".into()],
                    remove: vec!["gull".into()],
                },
                TagChange {
                    picture: "c.png".into(),
                    remove: vec!["old  town".into()],
                    ..TagChange::default()
                },
                TagChange {
                    picture: "d.png".into(),
                    add: vec!["pier".into(), "Sea".into()],
                    ..TagChange::default()
                },
            ]
        );
        let conflict = [
            row("a.png", "Kelp", Suggested, Accept),
            row("a.png", "kelp", Disputed, Remove),
        ];
        let message = changes_from_sheet(&conflict).unwrap_err().to_string();
        assert!(
            message.contains("a.png") && message.contains("kelp"),
            "{message}"
        );
    }

    fn cell_text() -> impl Strategy<Value = String> {
        // Spreadsheet-hostile characters on purpose: separators, quotes, line breaks,
        // formula starts, apostrophes, non-ASCII.
        "[a-zA-Z0-9 ,;\"'\n\r\t=+@#éß漢🙂-]{1,12}"
    }

    proptest! {
        #[test]
        fn sheet_round_trips(
            cells in proptest::collection::vec(
                (cell_text(), cell_text(), proptest::option::of(0.0f32..=1.0), any::<bool>(), 0..4u8),
                0..12,
            )
        ) {
            let rows: Vec<SheetRow> = cells
                .into_iter()
                .filter(|(picture, tag, ..)| !picture.trim().is_empty() && normalize_tag(tag).is_some())
                .map(|(picture, tag, probability, disputed, decision)| {
                    let kind = if disputed { RowKind::Disputed } else { RowKind::Suggested };
                    let decision = match (decision, kind) {
                        (0, _) => Decision::Undecided,
                        (1, _) => Decision::Accept,
                        (3, RowKind::Disputed) => Decision::Remove,
                        _ => Decision::Reject,
                    };
                    SheetRow { picture, tag: tag.trim().to_string(), probability, kind, decision }
                })
                .collect();
            let bytes = render_sheet(&rows).unwrap();
            let back = parse_sheet(Path::new("p.csv"), &bytes).unwrap();
            prop_assert_eq!(back.len(), rows.len());
            for (read, wrote) in back.iter().zip(&rows) {
                prop_assert_eq!(&read.picture, &wrote.picture);
                prop_assert_eq!(&read.tag, &wrote.tag);
                prop_assert_eq!(read.kind, wrote.kind);
                prop_assert_eq!(read.decision, wrote.decision);
                match (read.probability, wrote.probability) {
                    (None, None) => {}
                    (Some(r), Some(w)) => prop_assert!((r - w).abs() <= 0.0005 + 1e-6, "{} vs {}", r, w),
                    other => prop_assert!(false, "{:?}", other),
                }
            }
        }
    }
}
