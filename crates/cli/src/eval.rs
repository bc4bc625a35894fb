use std::path::PathBuf;

use anyhow::bail;
use tagweave_eval::{baselines, evaluate, EvalOptions, Progress};
use tagweave_indexer::FeatureTable;

use crate::exit::Outcome;
use crate::progress;
use crate::scan::{open_for_scan, scan_with_progress, ScanArgs};

#[derive(clap::Args)]
pub struct EvalArgs {
    /// A tagged photo folder; it is scanned first (only changes are read again).
    pub folder: PathBuf,
    /// Seed for the split and every random choice: the same seed gives the same numbers.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Share of tagged pictures the methods learn from; the rest are scored blind.
    #[arg(long, default_value_t = 0.75)]
    pub train_fraction: f64,
    /// Print one JSON object instead of a table.
    #[arg(long, conflicts_with = "markdown")]
    pub json: bool,
    /// Print a Markdown table (for BENCHMARKS.md).
    #[arg(long)]
    pub markdown: bool,
}

pub fn run(args: &EvalArgs) -> anyhow::Result<Outcome> {
    let scan_args = ScanArgs::plain(args.folder.clone());
    let store = open_for_scan(&scan_args)?;
    scan_with_progress(&store, &scan_args.options())?;
    let table = FeatureTable::load(&store)?;
    if table.items.iter().filter(|i| !i.tags.is_empty()).count() < 8 {
        bail!(
            "{} has too few tagged pictures to hold some back and measure; tag at least 8",
            args.folder.display()
        );
    }
    let tags: Vec<Vec<String>> = table.items.iter().map(|i| i.tags.clone()).collect();
    let keys: Vec<String> = table.items.iter().map(|i| i.content_hash.clone()).collect();
    let options = EvalOptions {
        seed: args.seed,
        train_fraction: args.train_fraction,
        ..EvalOptions::default()
    };
    let mut methods = baselines();
    let bar = progress::bar("evaluating");
    let report = evaluate(
        table.features.view(),
        &tags,
        &keys,
        &options,
        &mut methods,
        &mut |event| {
            let (step, index, total) = match event {
                Progress::Fitting { index, total, .. } => (0, index, total),
                Progress::Measuring { index, total, .. } => (1, index, total),
            };
            bar.set_length(2 * total as u64);
            bar.set_position((2 * index + step) as u64);
        },
    )?;
    bar.finish_and_clear();
    if args.json {
        println!("{}", serde_json::to_string(&report)?);
    } else if args.markdown {
        print!("{}", report.to_markdown());
    } else {
        print!("{}", report.to_table());
    }
    Ok(Outcome::Done)
}
