//! `tagweave shard …`: the slow work of a scan split into parts for many machines, the
//! parts exchanged as Parquet files, and merged back into one store.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use tagweave_collection::Skipped;
use tagweave_indexer::shards::{self, MergeProgress, Part};
use tagweave_indexer::ScanOptions;
use tagweave_store::Store;

use crate::exit::Outcome;
use crate::scan::stage_of;
use crate::{progress, store_path, StoreArgs};

#[derive(clap::Args)]
pub struct ShardArgs {
    #[command(subcommand)]
    pub step: Step,
}

#[derive(clap::Subcommand)]
pub enum Step {
    /// Learn the feature extractor of a folder once, into a small file every machine reads.
    Learn(LearnArgs),
    /// Describe one part of a folder's pictures into a Parquet file.
    Describe(DescribeArgs),
    /// Write the store's trained model to a file, for coding parts elsewhere.
    Model(ModelArgs),
    /// Code the pictures of one part's Parquet file with a model file.
    Code(CodeArgs),
    /// Take part files (features, then codes) into the folder's store.
    Merge(MergeArgs),
}

impl ShardArgs {
    pub fn json(&self) -> bool {
        match &self.step {
            Step::Learn(a) => a.json,
            Step::Describe(a) => a.json,
            Step::Code(a) => a.json,
            Step::Merge(a) => a.json,
            Step::Model(_) => false,
        }
    }
}

#[derive(clap::Args)]
pub struct LearnArgs {
    /// The photo folder.
    pub folder: PathBuf,
    /// Where to write the extractor.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Seed for every random choice made while learning (as `scan --seed`).
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Follow symbolic links (loops are detected and skipped).
    #[arg(long)]
    pub follow_symlinks: bool,
    /// Print the summary as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(clap::Args)]
pub struct DescribeArgs {
    /// The photo folder (the same folder, at any path, on every machine).
    pub folder: PathBuf,
    /// The extractor file `tagweave shard learn` wrote.
    #[arg(long, value_name = "FILE")]
    pub extractor: PathBuf,
    /// Which part: K/N, the K-th of N parts (1 ≤ K ≤ N).
    #[arg(long, value_name = "K/N")]
    pub part: String,
    /// Where to write the part's Parquet file.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Follow symbolic links (loops are detected and skipped).
    #[arg(long)]
    pub follow_symlinks: bool,
    /// Print the summary as one JSON object.
    #[arg(long)]
    pub json: bool,
    /// Also list every skipped file.
    #[arg(long, short)]
    pub verbose: bool,
}

#[derive(clap::Args)]
pub struct ModelArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// Where to write the model.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
}

#[derive(clap::Args)]
pub struct CodeArgs {
    /// The model file `tagweave shard model` wrote.
    #[arg(long, value_name = "FILE")]
    pub model: PathBuf,
    /// The part's features file `tagweave shard describe` wrote.
    #[arg(long, value_name = "FILE")]
    pub features: PathBuf,
    /// Where to write the part's codes.
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
    /// Print the summary as one JSON object.
    #[arg(long)]
    pub json: bool,
}

#[derive(clap::Args)]
pub struct MergeArgs {
    /// The photo folder the parts were made from.
    pub folder: PathBuf,
    /// Part files (features and codes, in any order).
    #[arg(required = true, value_name = "FILE")]
    pub files: Vec<PathBuf>,
    #[command(flatten)]
    pub store: StoreArgs,
    /// The extractor file the parts were described with; needed when the store has none.
    #[arg(long, value_name = "FILE")]
    pub extractor: Option<PathBuf>,
    /// Print the summary as one JSON object.
    #[arg(long)]
    pub json: bool,
}

pub fn run(args: &ShardArgs) -> anyhow::Result<Outcome> {
    match &args.step {
        Step::Learn(a) => learn(a),
        Step::Describe(a) => describe(a),
        Step::Model(a) => model(a),
        Step::Code(a) => code(a),
        Step::Merge(a) => merge(a),
    }
}

fn folder(path: &Path) -> anyhow::Result<()> {
    if !path.is_dir() {
        bail!("{} is not a folder; give the photo folder", path.display());
    }
    Ok(())
}

/// Writes `bytes` to a hidden file beside `path`, flushes it and renames it over `path`.
fn write_whole(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    let name = path
        .file_name()
        .with_context(|| format!("{} names no file", path.display()))?;
    let partial = path.with_file_name(format!(".{}.partial", name.to_string_lossy()));
    let write = || -> std::io::Result<()> {
        let mut file = std::fs::File::create(&partial)?;
        std::io::Write::write_all(&mut file, bytes)?;
        file.sync_all()?;
        std::fs::rename(&partial, path)
    };
    write().with_context(|| format!("cannot write {}", path.display()))
}

fn print_skips(skipped: &[Skipped], verbose: bool) {
    const SHOWN: usize = 10;
    let shown = if verbose { usize::MAX } else { SHOWN };
    for skip in skipped.iter().take(shown) {
        println!("    {skip}");
    }
    if skipped.len() > shown {
        println!(
            "    … and {} more (--verbose lists them all)",
            skipped.len() - shown
        );
    }
}

fn outcome(skipped: &[Skipped]) -> Outcome {
    if skipped.is_empty() {
        Outcome::Done
    } else {
        Outcome::DoneWithSkips
    }
}

fn learn(args: &LearnArgs) -> anyhow::Result<Outcome> {
    folder(&args.folder)?;
    let options = ScanOptions {
        follow_symlinks: args.follow_symlinks,
        seed: args.seed,
        ..ScanOptions::default()
    };
    let progress = progress::Progress::new();
    let (bytes, report) = shards::learn_extractor(&args.folder, &options, &|event| {
        let (stage, done, total) = stage_of(event);
        progress.show(stage, done, total);
    })?;
    progress.finish();
    write_whole(&args.out, &bytes)?;
    if args.json {
        let mut value = serde_json::to_value(&report)?;
        value["out"] = serde_json::json!(args.out);
        value["skipped"] = report.skipped_files.len().into();
        println!("{value}");
    } else {
        println!(
            "Learned the feature extractor of {} from {} pictures in {:.1} s",
            args.folder.display(),
            report.pictures,
            report.seconds
        );
        println!("  values    {:>6}  per picture", report.dimension);
        println!("  print     {}", &report.fingerprint[..16]);
        println!("  written   {}", args.out.display());
        if !report.skipped_files.is_empty() {
            println!("  skipped   {:>6}  files", report.skipped_files.len());
            print_skips(&report.skipped_files, false);
        }
    }
    Ok(outcome(&report.skipped_files))
}

fn describe(args: &DescribeArgs) -> anyhow::Result<Outcome> {
    folder(&args.folder)?;
    let part: Part = args.part.parse()?;
    let progress = progress::Progress::new();
    let report = shards::describe_part(
        &args.folder,
        &args.extractor,
        part,
        args.follow_symlinks,
        &args.out,
        &|event| {
            let (stage, done, total) = stage_of(event);
            progress.show(stage, done, total);
        },
    )?;
    progress.finish();
    if args.json {
        let mut value = serde_json::to_value(&report)?;
        value["out"] = serde_json::json!(args.out);
        value["skipped_files"] = report
            .skipped_files
            .iter()
            .map(|s| s.to_string())
            .collect::<Vec<_>>()
            .into();
        println!("{value}");
    } else {
        println!(
            "Described part {} of {} in {:.1} s",
            report.part,
            args.folder.display(),
            report.seconds
        );
        println!(
            "  pictures  {:>6}  in this part ({} in the folder)",
            report.in_part, report.pictures
        );
        println!(
            "  described {:>6}  ({} values each)",
            report.described, report.dimension
        );
        if !report.skipped_files.is_empty() {
            println!("  skipped   {:>6}  files", report.skipped_files.len());
            print_skips(&report.skipped_files, args.verbose);
        }
        println!("  written   {}", args.out.display());
    }
    Ok(outcome(&report.skipped_files))
}

fn model(args: &ModelArgs) -> anyhow::Result<Outcome> {
    let store = store_path::open_existing(args.store.store.as_deref())?;
    let Some(bytes) = shards::model_file_bytes(&store)? else {
        bail!(
            "the store at {} has no trained model; run `tagweave train` first",
            store.dir().display()
        );
    };
    write_whole(&args.out, &bytes)?;
    println!(
        "Wrote the model of {} ({}) to {}",
        store.dir().display(),
        &shards::fingerprint(&bytes)[..16],
        args.out.display()
    );
    Ok(Outcome::Done)
}

fn code(args: &CodeArgs) -> anyhow::Result<Outcome> {
    let report = shards::code_part(&args.model, &args.features, &args.out)?;
    if args.json {
        let mut value = serde_json::to_value(&report)?;
        value["out"] = serde_json::json!(args.out);
        println!("{value}");
    } else {
        println!(
            "Coded part {} ({} pictures) in {:.1} s into {}",
            report.part,
            report.coded,
            report.seconds,
            args.out.display()
        );
    }
    Ok(Outcome::Done)
}

fn merge(args: &MergeArgs) -> anyhow::Result<Outcome> {
    folder(&args.folder)?;
    let dir = store_path::for_folder(&args.folder, args.store.store.as_deref());
    let store = Store::open_or_create(&dir, &args.folder)?;
    let progress = progress::Progress::new();
    let report = shards::merge(
        &store,
        &args.files,
        args.extractor.as_deref(),
        &mut |event| match event {
            MergeProgress::Checking { done, total } => progress.show("checking files", done, total),
            MergeProgress::Merging { done, total } => progress.show("merging files", done, total),
        },
    )?;
    progress.finish();
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else {
        println!(
            "Merged {} file(s) into {} in {:.1} s",
            report.files.len(),
            store.dir().display(),
            report.seconds
        );
        if report.extractor_stored {
            println!("  extractor stored from {}", display_opt(&args.extractor));
        }
        for file in &report.files {
            println!(
                "  {:<8} part {:<7} {:>6} rows: {} written, {} already there{}  {}",
                file.kind,
                file.part,
                file.rows,
                file.written,
                file.unchanged,
                if file.not_in_store > 0 {
                    format!(", {} not in the store", file.not_in_store)
                } else {
                    String::new()
                },
                file.path.display()
            );
        }
    }
    Ok(Outcome::Done)
}

fn display_opt(path: &Option<PathBuf>) -> String {
    path.as_ref()
        .map(|p| p.display().to_string())
        .unwrap_or_default()
}
