//! Writing reviewed tags back into the sidecar files, which are the record of a collection,
//! and the review sheet people fill in to decide which tags those are.
//!
//! The flow: [`write_sheet`] → a person fills the `accept` column → [`read_sheet`] →
//! [`changes_from_sheet`] → [`Planner::plan`] per picture → [`diff`] (dry run) or
//! [`commit_plan`].
//!
//! Promises:
//! - **Never a lost tag.** Every new file is read back with the collection's own readers
//!   before it is offered, and must give exactly the old tags ∪ added − removed (compared
//!   under [`normalize_tag`](tagweave_collection::normalize_tag)); otherwise the picture is
//!   refused with the reason. A tag is removed only when its sheet row says `remove`.
//! - **Only what changes changes.** Text sidecars get lines appended (in the file's own
//!   line-ending style, after a final line end if it lacked one); removing a tag takes out only
//!   the lines, or the comma-separated pieces of a line, that normalise to it. XMP sidecars are
//!   edited by splicing bytes: new `rdf:li` items at the end of the `dc:subject` bag (or a new
//!   `dc:subject` bag in the first `rdf:Description`), removed items cut out, every other byte
//!   kept. Forms that cannot be edited so are refused, naming the file, never rewritten.
//! - **Which sidecar.** New tags go into every sidecar the picture has, so a text file and an
//!   XMP file beside one picture stay in step and either one alone shows every accepted tag;
//!   a removed tag comes out of every sidecar holding it (the reader merges them all, so
//!   anything less would not remove it). A tag the picture already carries in any sidecar, in
//!   any spelling the normaliser equates, is reported as already present and written nowhere.
//!   A picture without a sidecar gets a new text sidecar `STEM.txt` (or `NAME.EXT.txt` when
//!   another picture of the folder shares the stem), which the crawler pairs with it. A
//!   sidecar that several pictures share is refused: its tags would reach them all.
//! - **Whose spelling.** An added tag is written the way the collection's own sidecars spell
//!   it ([`Spellings`]): the spelling most of its pictures use for that normalised tag (`Sea`,
//!   `naïve art`), a tie going to the smallest in code point order, whatever case or spacing
//!   the sheet gave, so one keyword never gets a second spelling. A tag no sidecar spells yet
//!   is written as the sheet has it (trimmed): a suggestion in the index's form, a tag a
//!   person typed into a to-tag row as typed.
//! - **Safe writes.** A temporary file in the same folder (hidden, so the crawler never takes
//!   a crash's leftover for anything), flushed, renamed over the sidecar, then the folder
//!   flushed. Before the first change to a sidecar its original is kept as `NAME.txt.orig` (or
//!   `NAME.xmp.orig`: the sidecar's own name with `.orig` added), never
//!   overwritten later. A sidecar whose bytes changed since planning is refused, not
//!   clobbered (checked when writing starts and again just before the rename).
//!
//! The review sheet ([`write_sheet`], [`read_sheet`]): RFC 4180 CSV in UTF-8 with a
//! byte-order mark (so spreadsheets pick the right encoding), columns `picture`, `tag`,
//! `probability`, `kind`, `accept`. A `picture` or `tag` cell that starts like a formula
//! (`=`, `+`, `-`, `@`, tab, carriage return) or with an apostrophe is written with one leading
//! apostrophe, and reading takes exactly that apostrophe off again. `accept` reads y/yes/n/no/
//! empty and `remove`; see [`Decision`] for what each means on a suggested or disputed row
//! (`y` on a disputed row keeps the tag: only `remove` removes).

mod atomic;
mod commit;
mod error;
mod plan;
mod sheet;
mod spelling;
mod text;
mod xmp;

#[cfg(test)]
mod tests;

pub use commit::{commit_edit, commit_plan, diff, original_path};
pub use error::WritebackError;
pub use plan::{plan_edit, PicturePlan, Planner, SidecarEdit};
pub use sheet::{
    changes_from_sheet, parse_sheet, read_sheet, render_sheet, write_sheet,
    write_sheet_keeping_decisions, Decision, RowKind, SheetRow, SheetWritten, TagChange, COLUMNS,
};
pub use spelling::Spellings;
