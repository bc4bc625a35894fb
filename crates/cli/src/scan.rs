use std::path::PathBuf;

use anyhow::{bail, Context};
use tagweave_indexer::{ScanOptions, ScanProgress, ScanReport};
use tagweave_store::Store;

use crate::exit::Outcome;
use crate::{progress, store_path, StoreArgs};

#[derive(clap::Args)]
pub struct ScanArgs {
    /// The photo folder to index.
    pub folder: PathBuf,
    #[command(flatten)]
    pub store: StoreArgs,
    /// Print the summary as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Also list every skipped file and every note (merged sidecars, odd extensions).
    #[arg(long, short)]
    pub verbose: bool,
    /// Follow symbolic links (loops are detected and skipped).
    #[arg(long)]
    pub follow_symlinks: bool,
    /// Throw the store away and build it again from the pictures and sidecars.
    #[arg(long)]
    pub rebuild: bool,
}

pub fn run(args: &ScanArgs) -> anyhow::Result<Outcome> {
    let store = open_for_scan(args)?;
    let report = scan_with_progress(&store, args.follow_symlinks)?;
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        print_summary(&store, &report, args.verbose);
    }
    Ok(if report.skipped.is_empty() {
        Outcome::Done
    } else {
        Outcome::DoneWithSkips
    })
}

pub fn open_for_scan(args: &ScanArgs) -> anyhow::Result<Store> {
    if !args.folder.is_dir() {
        bail!(
            "{} is not a folder; give the photo folder to index",
            args.folder.display()
        );
    }
    let dir = store_path::for_folder(&args.folder, args.store.store.as_deref());
    if args.rebuild {
        Store::remove(&dir).with_context(|| format!("cannot rebuild {}", dir.display()))?;
    }
    Ok(Store::open_or_create(&dir, &args.folder)?)
}

pub fn scan_with_progress(store: &Store, follow_symlinks: bool) -> anyhow::Result<ScanReport> {
    let bar = progress::bar("reading pictures");
    let report =
        tagweave_indexer::scan(
            store,
            &ScanOptions { follow_symlinks },
            &|event| match event {
                ScanProgress::Crawled { to_read, .. } => bar.set_length(to_read as u64),
                ScanProgress::Read { done, .. } => bar.set_position(done as u64),
            },
        )?;
    bar.finish_and_clear();
    Ok(report)
}

/// How many skipped files are listed by name without --verbose.
const SKIPPED_SHOWN: usize = 10;

pub fn print_summary(store: &Store, report: &ScanReport, verbose: bool) {
    println!(
        "Indexed {} in {:.1} s",
        store.collection_root().display(),
        report.seconds
    );
    println!(
        "  pictures  {:>6}  ({} tagged, {} untagged)",
        report.items, report.tagged, report.untagged
    );
    println!("  tags      {:>6}  distinct", report.tags);
    println!(
        "  changes   {:>6}  added, {} refreshed, {} unchanged, {} removed",
        report.added, report.refreshed, report.unchanged, report.removed
    );
    if report.other_files > 0 {
        println!(
            "  other     {:>6}  files left alone (neither pictures nor sidecars)",
            report.other_files
        );
    }
    let skipped: usize = report.skipped.values().sum();
    if skipped > 0 {
        let groups: Vec<String> = report
            .skipped
            .iter()
            .map(|(reason, count)| format!("{count} {reason}"))
            .collect();
        println!("  skipped   {skipped:>6}  files: {}", groups.join(", "));
        let shown = if verbose { usize::MAX } else { SKIPPED_SHOWN };
        for skip in report.skipped_files.iter().take(shown) {
            println!("    {skip}");
        }
        if report.skipped_files.len() > shown {
            println!(
                "    … and {} more (--verbose lists them all)",
                report.skipped_files.len() - shown
            );
        }
    }
    if verbose {
        for note in &report.notes {
            println!("  note: {}: {}", note.path.display(), note.message);
        }
    }
    println!("  store     {}", store.dir().display());
}
