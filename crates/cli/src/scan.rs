use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use serde::Serialize;
use tagweave_collection::SkipReason;
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
    let mut store = open_for_scan(args)?;
    let report = scan_with_progress(&store, &args.options())?;
    crate::progress::compact_with_note(&mut store)?;
    // On a trained store, what the next question would wait for is worked out now (an
    // untrained or outdated model has nothing to prepare; the summary says what to do).
    if let Ok(queries) = tagweave_query::Queries::open(&store) {
        crate::progress::with_spinner("preparing for questions", || queries.prepare())?;
    }
    if args.json {
        let json = ScanJson::new(store.collection_root(), &report);
        println!("{}", serde_json::to_string(&json)?);
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
    let progress = progress::Progress::new();
    let report = tagweave_indexer::scan(store, options, &|event| {
        let (message, done, total) = stage_of(event);
        progress.show(message, done, total);
    })?;
    progress.finish();
    Ok(report)
}

/// What the progress bar says of a scan event (also of `tagweave shard`'s steps).
pub fn stage_of(event: ScanProgress) -> (&'static str, usize, usize) {
    match event {
        ScanProgress::Crawled { to_read, .. } => ("reading pictures", 0, to_read),
        ScanProgress::Read { done, total } => ("reading pictures", done, total),
        ScanProgress::Learning { done, total } => ("learning patch dictionary", done, total),
        ScanProgress::Encoding { done, total } => ("describing pictures", done, total),
        ScanProgress::Coding { done, total } => ("coding new pictures", done, total),
    }
}

/// The `--json` summary: the report's own fields, unchanged, plus every skipped file.
#[derive(Serialize)]
struct ScanJson<'r> {
    #[serde(flatten)]
    report: &'r ScanReport,
    /// All of them, never capped (`skipped` counts the same files by reason), sorted by path.
    skipped_files: Vec<SkippedJson>,
}

/// One skipped file for scripts.
#[derive(Serialize, PartialEq, Eq, PartialOrd, Ord)]
struct SkippedJson {
    /// Relative to the collection folder, `/`-separated. A name that is not UTF-8 (reason
    /// "bad file name") is shown lossily: each invalid byte sequence becomes U+FFFD, so
    /// such a path names the file for a person but may not open it.
    path: String,
    /// The key the summary counts it under (`SkipReason::label`), e.g. "damaged picture".
    reason: &'static str,
    /// For "bad sidecar": the sidecar that could not be read (the path is its picture).
    #[serde(skip_serializing_if = "Option::is_none")]
    sidecar: Option<String>,
    /// The line `--verbose` prints for it: what went wrong and what to do.
    message: String,
}

impl<'r> ScanJson<'r> {
    fn new(root: &Path, report: &'r ScanReport) -> ScanJson<'r> {
        let mut skipped_files: Vec<SkippedJson> = report
            .skipped_files
            .iter()
            .map(|skip| SkippedJson {
                path: relative_name(root, &skip.path),
                reason: skip.reason.label(),
                sidecar: match &skip.reason {
                    SkipReason::BadSidecar { sidecar, .. } => Some(relative_name(root, sidecar)),
                    _ => None,
                },
                message: skip.to_string(),
            })
            .collect();
        skipped_files.sort();
        ScanJson {
            report,
            skipped_files,
        }
    }
}

/// `path` relative to `root`, `/`-separated, lossy where not UTF-8; `.` for the root itself
/// (a walk error can be reported there). A path outside `root` (the crawl reports none)
/// is given whole rather than misnamed.
fn relative_name(root: &Path, path: &Path) -> String {
    let Ok(relative) = path.strip_prefix(root) else {
        return path.to_string_lossy().into_owned();
    };
    let parts: Vec<_> = relative
        .components()
        .map(|part| part.as_os_str().to_string_lossy())
        .collect();
    if parts.is_empty() {
        ".".to_string()
    } else {
        parts.join("/")
    }
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
    if report.accepted_suggestions > 0 {
        println!(
            "  accepted  {:>6}  tags were suggestions a person accepted ({} pictures carry \
             no other tag)",
            report.accepted_suggestions, report.tagged_only_by_suggestions
        );
    }
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
