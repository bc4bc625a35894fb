//! `tagweave apply SHEET`: write the reviewed decisions of a sheet into the sidecars.

use std::collections::{BTreeMap, HashSet};
use std::path::PathBuf;

use serde::Serialize;
use tagweave_collection::{closest_tag, normalize_tag, CrawlOptions, Vocabulary};
use tagweave_writeback::{
    changes_from_sheet, commit_plan, diff, original_path, read_sheet, Planner, TagChange,
};

use crate::exit::Outcome;
use crate::{store_path, StoreArgs};

#[derive(clap::Args)]
pub struct ApplyArgs {
    /// The filled-in review sheet (CSV).
    pub sheet: PathBuf,
    /// Show what would change, change nothing.
    #[arg(long)]
    pub dry_run: bool,
    #[command(flatten)]
    pub store: StoreArgs,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
}

#[derive(Serialize, Default)]
struct ApplyReport {
    pictures_changed: usize,
    sidecars_written: usize,
    sidecars_created: usize,
    tags_added: usize,
    /// Of `tags_added`, the suggestions a person accepted, marked as such in the sidecar.
    tags_marked_accepted: usize,
    tags_removed: usize,
    already_present: usize,
    /// Tags asked to be removed that no sidecar of the picture holds (for example a keyword
    /// kept inside the picture file, which tagweave never changes), by picture.
    not_in_sidecars: Vec<(String, String)>,
    refused: Vec<(String, String)>,
    /// Accepted tags no picture of the collection carried yet (a typing slip, or a
    /// deliberately new tag), each with the known tag it is nearest to, if any.
    new_tags: Vec<NewTag>,
    dry_run: bool,
}

#[derive(Serialize)]
struct NewTag {
    tag: String,
    pictures: usize,
    nearest_known: Option<String>,
}

/// The tags `changes` add that no picture of `vocabulary` carries yet, with how many
/// pictures get each and the known tag it is nearest to (by edit distance).
fn new_tags(changes: &[TagChange], vocabulary: &Vocabulary) -> Vec<NewTag> {
    let known: HashSet<&str> = vocabulary
        .entries()
        .iter()
        .map(|(t, _)| t.as_str())
        .collect();
    let mut new: BTreeMap<String, usize> = BTreeMap::new();
    for tag in changes.iter().flat_map(|c| c.add.iter().chain(&c.accept)) {
        if let Some(normal) = normalize_tag(tag).filter(|t| !known.contains(t.as_str())) {
            *new.entry(normal).or_default() += 1;
        }
    }
    new.into_iter()
        .map(|(tag, pictures)| NewTag {
            nearest_known: closest_tag(&tag, vocabulary.entries().iter().map(|(t, _)| t.as_str()))
                .map(str::to_string),
            tag,
            pictures,
        })
        .collect()
}

pub fn run(args: &ApplyArgs) -> anyhow::Result<Outcome> {
    // Holding the store keeps a scan from reading sidecars while they change.
    let store = store_path::open_existing(args.store.store.as_deref())?;
    let rows = read_sheet(&args.sheet)?;
    let changes = changes_from_sheet(&rows)?;
    let root = store.collection_root().to_path_buf();
    let planner = Planner::new(
        &root,
        &CrawlOptions {
            skip_dirs: vec![store.dir().to_path_buf()],
            ..CrawlOptions::default()
        },
    )?;
    let mut report = ApplyReport {
        dry_run: args.dry_run,
        new_tags: new_tags(&changes, &store.vocabulary()?),
        ..ApplyReport::default()
    };
    // An example of the name the first version of a changed sidecar is kept under.
    let mut kept_as = None;
    for change in &changes {
        let plan = match planner.plan(change) {
            Ok(plan) => plan,
            Err(error) => {
                report
                    .refused
                    .push((change.picture.clone(), error.to_string()));
                continue;
            }
        };
        report.already_present += plan.already_present.len();
        report.not_in_sidecars.extend(
            plan.not_present
                .iter()
                .map(|tag| (change.picture.clone(), tag.clone())),
        );
        if plan.is_empty() {
            continue;
        }
        if args.dry_run {
            if !args.json {
                for edit in &plan.edits {
                    print!("{}", diff(edit));
                }
            }
        } else if let Err(error) = commit_plan(&plan) {
            report
                .refused
                .push((change.picture.clone(), error.to_string()));
            continue;
        }
        report.pictures_changed += 1;
        for edit in &plan.edits {
            if !edit.created && kept_as.is_none() {
                kept_as = Some(original_path(&edit.sidecar));
            }
            report.sidecars_written += 1;
            report.sidecars_created += usize::from(edit.created);
            report.tags_added += edit.added.len();
            report.tags_marked_accepted += edit.marked.len();
            report.tags_removed += edit.removed.len();
        }
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        println!(
            "{} {} pictures: {} tags added ({} marked as accepted suggestions), {} removed, {} sidecars written ({} new); {} accepted tags were already there",
            if args.dry_run { "Dry run:" } else { "Done:" },
            report.pictures_changed,
            report.tags_added,
            report.tags_marked_accepted,
            report.tags_removed,
            report.sidecars_written,
            report.sidecars_created,
            report.already_present
        );
        for (picture, reason) in &report.refused {
            println!("  not changed: {picture}: {reason}");
        }
        for (picture, tag) in &report.not_in_sidecars {
            println!(
                "  not removed: {picture}: no sidecar holds `{tag}`; if it is a keyword kept \
                 inside the picture file, remove it with the program that wrote it (tagweave \
                 never changes pictures)"
            );
        }
        for new in &report.new_tags {
            println!(
                "  new tag `{}` ({} {}): no picture of the collection carried it before{}",
                new.tag,
                new.pictures,
                if new.pictures == 1 {
                    "picture"
                } else {
                    "pictures"
                },
                new.nearest_known
                    .as_ref()
                    .map(|k| format!("; did you mean `{k}`?"))
                    .unwrap_or_default()
            );
        }
        if let (false, Some(example)) = (args.dry_run, &kept_as) {
            let name = example.file_name().unwrap_or_default().to_string_lossy();
            println!(
                "The first version of each changed sidecar is kept beside it with `.orig` \
                 added to its name (e.g. {name}); new sidecars have none."
            );
        }
        if !args.dry_run && report.pictures_changed > 0 {
            println!(
                "Run `tagweave scan {}` so the index sees the new tags.",
                root.display()
            );
        }
    }
    Ok(if report.refused.is_empty() {
        Outcome::Done
    } else {
        Outcome::DoneWithSkips
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn change(picture: &str, add: &[&str]) -> TagChange {
        TagChange {
            picture: picture.into(),
            add: add.iter().map(|t| t.to_string()).collect(),
            ..TagChange::default()
        }
    }

    #[test]
    fn a_tag_no_picture_carried_is_named_with_the_nearest_known_one() {
        let lists = [
            vec!["cliffs".to_string(), "sea".to_string()],
            vec!["sea".to_string()],
        ];
        let vocabulary = Vocabulary::from_tag_lists(lists.iter().map(Vec::as_slice));
        let changes = [
            change("a.jpg", &["clifs", "Sea"]),
            change("b.jpg", &["clifs", "lighthouse"]),
        ];
        let new = new_tags(&changes, &vocabulary);
        let got: Vec<(&str, usize, Option<&str>)> = new
            .iter()
            .map(|n| (n.tag.as_str(), n.pictures, n.nearest_known.as_deref()))
            .collect();
        assert_eq!(
            got,
            [("clifs", 2, Some("cliffs")), ("lighthouse", 1, None)],
            "`Sea` is known as sea"
        );
    }
}
