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
    /// Learn the picture features again (patch dictionary, standardisation) and redo them.
    #[arg(long)]
    pub relearn: bool,
    /// Seed for every random choice made while learning features.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
}

pub fn run(args: &ScanArgs) -> anyhow::Result<Outcome> {
    let store = open_for_scan(args)?;
    let report = scan_with_progress(&store, &args.options())?;
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

impl ScanArgs {
    /// The arguments a plain `tagweave scan FOLDER` would have.
    pub fn plain(folder: PathBuf) -> ScanArgs {
        ScanArgs {
            folder,
            store: StoreArgs { store: None },
            json: false,
            verbose: false,
            follow_symlinks: false,
            rebuild: false,
            relearn: false,
            seed: 7,
        }
    }

    pub fn options(&self) -> ScanOptions {
        ScanOptions {
            follow_symlinks: self.follow_symlinks,
            relearn: self.relearn,
            seed: self.seed,
            ..ScanOptions::default()
        }
    }
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

pub fn scan_with_progress(store: &Store, options: &ScanOptions) -> anyhow::Result<ScanReport> {
    let bar = progress::bar("reading pictures");
    let report = tagweave_indexer::scan(store, options, &|event| {
        let (message, done, total) = match event {
            ScanProgress::Crawled { to_read, .. } => ("reading pictures", 0, to_read),
            ScanProgress::Read { done, total } => ("reading pictures", done, total),
            ScanProgress::Learning { done, total } => ("learning patch dictionary", done, total),
            ScanProgress::Encoding { done, total } => ("describing pictures", done, total),
            ScanProgress::Coding { done, total } => ("coding new pictures", done, total),
        };
        bar.set_message(message);
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    })?;
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
    let features = &report.features;
    println!(
        "  features  {:>6}  pictures described ({} values each{})",
        features.encoded,
        features.dimension,
        if features.learned {
            ", extractor learned now"
        } else {
            ""
        }
    );
    if report.coded > 0 {
        println!(
            "  codes     {:>6}  new pictures coded with the trained model",
            report.coded
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
