use std::path::PathBuf;

use anyhow::bail;

use crate::exit::Outcome;
use crate::scan::{open_for_scan, print_summary, scan_with_progress, ScanArgs};

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
    drop(store);
    println!();
    println!("== Step 2: how well can tags be told from the pictures alone?");
    println!("   (a quarter of the tagged pictures are held back and scored blind; the known");
    println!("   wrong tags of TRUTH.csv are looked for by methods that never saw them)");
    let truth = folder.join("TRUTH.csv");
    crate::eval::run(&crate::eval::EvalArgs {
        folder,
        seed: 7,
        train_fraction: 0.75,
        known_mislabels: truth.is_file().then_some(truth),
        json: false,
        markdown: false,
    })?;
    Ok(Outcome::Done)
}
