use std::path::{Path, PathBuf};

use anyhow::{bail, Context};

use crate::ask::{self, AuditArgs, FindArgs, RankArgs, ShiftArgs, SuggestArgs};
use crate::exit::Outcome;
use crate::scan::{open_for_scan, print_summary, scan_with_progress, ScanArgs};
use tagweave_indexer::TrainRunOptions;

use crate::train::{print_summary as print_train_summary, train_with_progress};
use crate::StoreArgs;

#[derive(clap::Args)]
pub struct DemoArgs {
    /// The demo archive; default: demo-collection/ of this source tree.
    pub folder: Option<PathBuf>,
}

/// Where the bundled archive sits when run from a source checkout.
fn bundled() -> PathBuf {
    let from_source = PathBuf::from(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../../demo-collection"
    ));
    if from_source.is_dir() {
        from_source.canonicalize().unwrap_or(from_source)
    } else {
        PathBuf::from("demo-collection")
    }
}

pub fn run(args: &DemoArgs) -> anyhow::Result<Outcome> {
    let folder = args.folder.clone().unwrap_or_else(bundled);
    if !folder.is_dir() {
        bail!(
            "no demo archive at {}; run this from the tagweave source folder, or pass the folder",
            folder.display()
        );
    }
    let scan_args = ScanArgs::plain(folder.clone());
    let store = open_for_scan(&scan_args)?;
    let report = scan_with_progress(&store, &scan_args.options())?;
    println!("== Step 1: index the invented Saltmarrow archive");
    print_summary(&store, &report, false);
    println!();
    println!("== The most used tags");
    crate::tags::print_table(&store.vocabulary()?, 15);
    println!();
    println!("== Step 2: learn one shared code for pictures and tags");
    let (trained, curves) = train_with_progress(&store, &TrainRunOptions::default())?;
    print_train_summary(&trained, &curves);
    let store_dir = store.dir().to_path_buf();
    drop(store);
    let store_args = || StoreArgs {
        store: Some(store_dir.clone()),
    };
    let rank = |limit| RankArgs {
        store: store_args(),
        untagged_only: false,
        limit,
        exact: false,
        json: false,
    };

    println!();
    println!("== Step 3: ask it things");
    println!("-- find night harbour: pictures that fit both tags, tagged or not");
    ask::find(&FindArgs {
        tags: vec!["night".into(), "harbour".into()],
        common: rank(8),
    })?;
    let untagged = first_untagged(&folder)?;
    if let Some(picture) = &untagged {
        println!();
        println!("-- suggest {picture}: tags for a picture nobody tagged");
        ask::suggest(&SuggestArgs {
            pictures: vec![folder.join(picture)],
            untagged: false,
            partly_tagged: false,
            sheet: store_dir.join(ask::SUGGESTIONS_SHEET),
            limit: 5,
            store: store_args(),
            json: false,
        })?;
    }
    if let Some(start) = first_with(&folder, &["day", "harbour"])? {
        println!();
        println!("-- shift {start} --away day --toward night: the same place, at night");
        ask::shift(&ShiftArgs {
            picture: folder.join(&start),
            away: vec!["day".into()],
            toward: vec!["night".into()],
            common: rank(5),
        })?;
    }
    println!();
    println!("-- audit: tagged pictures whose tags do not fit them, worst first");
    ask::audit(&AuditArgs {
        store: store_args(),
        limit: 5,
        all: false,
        sheet: store_dir.join(ask::AUDIT_SHEET),
        json: false,
    })?;
    println!();
    println!(
        "== Step 4: how good is it? (a quarter of the tagged pictures held back, scored blind)"
    );
    let truth = folder.join("TRUTH.csv");
    crate::eval::run(&crate::eval::EvalArgs::plain(
        folder,
        truth.is_file().then_some(truth),
    ))?;
    println!();
    println!(
        "The audit's review sheet is {}; `tagweave suggest --untagged` writes one for the \
         untagged pictures. Nothing was written to any sidecar: a person decides, then \
         `tagweave apply SHEET` writes what they accepted.",
        store_dir.join(ask::AUDIT_SHEET).display()
    );
    Ok(Outcome::Done)
}

/// Rows of the archive's TRUTH.csv (generated alongside it): relative path, written tags.
fn truth_rows(folder: &Path) -> anyhow::Result<Vec<(String, Vec<String>)>> {
    let path = folder.join("TRUTH.csv");
    if !path.is_file() {
        return Ok(Vec::new());
    }
    let text = std::fs::read_to_string(&path)
        .with_context(|| format!("cannot read {}", path.display()))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap_or_default().split(',').collect();
    let col = |name| header.iter().position(|h| *h == name);
    let (Some(file), Some(written)) = (col("file"), col("written_tags")) else {
        return Ok(Vec::new());
    };
    Ok(lines
        .map(|l| l.split(',').collect::<Vec<_>>())
        .filter(|cells| cells.len() > file.max(written))
        .map(|cells| {
            let tags = cells[written]
                .split(';')
                .filter(|t| !t.is_empty())
                .map(str::to_string)
                .collect();
            (cells[file].to_string(), tags)
        })
        .collect())
}

fn first_untagged(folder: &Path) -> anyhow::Result<Option<String>> {
    Ok(truth_rows(folder)?
        .into_iter()
        .find(|(_, tags)| tags.is_empty())
        .map(|(file, _)| file))
}

fn first_with(folder: &Path, wanted: &[&str]) -> anyhow::Result<Option<String>> {
    Ok(truth_rows(folder)?
        .into_iter()
        .find(|(_, tags)| wanted.iter().all(|w| tags.iter().any(|t| t == w)))
        .map(|(file, _)| file))
}
