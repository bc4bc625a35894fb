//! `tagweave to-tag`: the untagged pictures worth tagging by hand next, with a reason each,
//! and a sheet to type their tags into.

use std::path::PathBuf;

use serde::Serialize;
use tagweave_query::{pictures_to_tag, ToTagList, ToTagReason};
use tagweave_suggest::TaggingStrategy;
use tagweave_writeback::{Decision, RowKind, SheetRow};

use crate::ask::{write_sheet_out, WrittenSheet};
use crate::exit::Outcome;
use crate::{store_path, StoreArgs};

pub const TO_TAG_SHEET: &str = "tagweave-to-tag.csv";

#[derive(clap::Args)]
pub struct ToTagArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// How many pictures to list.
    #[arg(long, default_value_t = 20)]
    pub count: usize,
    /// How to choose: `unlike-tagged` takes each next picture least like anything tagged
    /// (or listed) so far; `least-sure` the pictures whose likeliest tag is least likely;
    /// `mixed` alternates the two. Without a trained model every way is `unlike-tagged`.
    #[arg(long, value_enum, default_value_t = Way::Mixed)]
    pub way: Way,
    /// Where the sheet goes: one row per listed picture; type its tags into the `tag` cell
    /// (several separated by commas), then run `tagweave apply` on it.
    #[arg(long, value_name = "CSV", default_value = TO_TAG_SHEET)]
    pub sheet: PathBuf,
    /// Print JSON instead of a list.
    #[arg(long)]
    pub json: bool,
}

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
pub enum Way {
    UnlikeTagged,
    LeastSure,
    Mixed,
}

impl Way {
    fn strategy(self) -> TaggingStrategy {
        match self {
            Way::UnlikeTagged => TaggingStrategy::Unlike,
            Way::LeastSure => TaggingStrategy::Unsure,
            Way::Mixed => TaggingStrategy::Mixed,
        }
    }
}

#[derive(Serialize)]
struct Answer {
    #[serde(flatten)]
    list: ToTagList,
    sheet: WrittenSheet,
}

pub fn run(args: &ToTagArgs) -> anyhow::Result<Outcome> {
    let store = store_path::open_existing(args.store.store.as_deref())?;
    let list = pictures_to_tag(&store, args.way.strategy(), args.count)?;
    let rows: Vec<SheetRow> = list
        .pictures
        .iter()
        .map(|p| SheetRow {
            picture: p.picture.clone(),
            tag: String::new(),
            probability: None,
            kind: RowKind::ToTag,
            decision: Decision::Undecided,
        })
        .collect();
    let sheet = write_sheet_out(&args.sheet, &rows)?;
    if args.json {
        println!("{}", serde_json::to_string(&Answer { list, sheet })?);
        return Ok(Outcome::Done);
    }
    if list.pictures.is_empty() {
        println!(
            "No picture to propose: {} untagged, none unlike the tagged ones (pictures with the \
             same content or nearly the same look as a tagged one are left out).",
            list.untagged
        );
        return Ok(Outcome::Done);
    }
    println!(
        "Tag these {} of {} untagged pictures first ({}{}):",
        list.pictures.len(),
        list.untagged,
        list.way,
        if list.trained {
            ""
        } else {
            "; no trained model yet, so chosen by look alone"
        }
    );
    for p in &list.pictures {
        println!("  {:<40} {}", p.picture, reason(&p.reason));
    }
    println!();
    println!(
        "Sheet: {} ({} rows). Type each picture's tags into its `tag` cell (several separated \
         by commas), then run `tagweave apply {}`.",
        sheet.path.display(),
        sheet.rows,
        sheet.path.display()
    );
    if sheet.kept_decisions > 0 {
        println!(
            "Tags already typed into it were kept: {}.",
            sheet.kept_decisions
        );
    }
    Ok(Outcome::Done)
}

fn reason(reason: &ToTagReason) -> String {
    match reason {
        ToTagReason::UnlikeTagged {
            nearest_similarity: Some(s),
        } => format!("unlike anything tagged yet (closest look-alike {s:.2})"),
        ToTagReason::UnlikeTagged {
            nearest_similarity: None,
        } => "least like the collection's average picture".to_string(),
        ToTagReason::ModelUnsure { likeliest, scores } => format!(
            "the model is less sure of it than of the others: likeliest {} ({:.2}), {} ({:.2})",
            likeliest[0], scores[0], likeliest[1], scores[1]
        ),
    }
}
