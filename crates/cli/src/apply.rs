//! `tagweave apply SHEET`: write the reviewed decisions of a sheet into the sidecars.

use std::path::PathBuf;

use serde::Serialize;
use tagweave_collection::CrawlOptions;
use tagweave_writeback::{changes_from_sheet, commit_plan, diff, read_sheet, Planner};

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
    tags_removed: usize,
    already_present: usize,
    refused: Vec<(String, String)>,
    dry_run: bool,
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
        ..ApplyReport::default()
    };
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
            report.sidecars_written += 1;
            report.sidecars_created += usize::from(edit.created);
            report.tags_added += edit.added.len();
            report.tags_removed += edit.removed.len();
        }
    }
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        println!(
            "{} {} pictures: {} tags added, {} removed, {} sidecars written ({} new); {} accepted tags were already there",
            if args.dry_run { "Dry run:" } else { "Done:" },
            report.pictures_changed,
            report.tags_added,
            report.tags_removed,
            report.sidecars_written,
            report.sidecars_created,
            report.already_present
        );
        for (picture, reason) in &report.refused {
            println!("  not changed: {picture}: {reason}");
        }
        if !args.dry_run && report.pictures_changed > 0 {
            println!(
                "Originals are kept beside each changed sidecar as NAME.orig. Run `tagweave scan {}` so the index sees the new tags.",
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
