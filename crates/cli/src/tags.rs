use std::path::PathBuf;

use serde::Serialize;

use crate::exit::Outcome;
use crate::{store_path, StoreArgs};

#[derive(clap::Args)]
pub struct TagsArgs {
    /// The collection folder (its store is FOLDER/.tagweave); the same as --store FOLDER.
    #[arg(conflicts_with = "store")]
    pub folder: Option<PathBuf>,
    #[command(flatten)]
    pub store: StoreArgs,
    /// Print one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Show at most this many tags (all when omitted).
    #[arg(long)]
    pub limit: Option<usize>,
}

#[derive(Serialize)]
struct TagCount<'a> {
    tag: &'a str,
    pictures: usize,
}

pub fn run(args: &TagsArgs) -> anyhow::Result<Outcome> {
    let store = store_path::open_existing(args.folder.as_deref().or(args.store.store.as_deref()))?;
    let vocabulary = store.vocabulary()?;
    let shown = args.limit.unwrap_or(usize::MAX);
    if args.json {
        let tags: Vec<TagCount> = vocabulary
            .entries()
            .iter()
            .take(shown)
            .map(|(tag, pictures)| TagCount {
                tag,
                pictures: *pictures,
            })
            .collect();
        let out = serde_json::json!({ "items": store.item_count()?, "distinct": vocabulary.len(), "tags": tags });
        println!("{out}");
    } else {
        print_table(&vocabulary, shown);
    }
    Ok(Outcome::Done)
}

pub fn print_table(vocabulary: &tagweave_collection::Vocabulary, shown: usize) {
    let entries = vocabulary.entries();
    let width = entries
        .iter()
        .take(shown)
        .map(|(tag, _)| tag.chars().count())
        .max()
        .unwrap_or(3)
        .max(3);
    println!("{:<width$}  pictures", "tag");
    for (tag, count) in entries.iter().take(shown) {
        println!("{tag:<width$}  {count:>8}");
    }
    if entries.len() > shown {
        println!(
            "… {} more tags (--limit to show more)",
            entries.len() - shown
        );
    }
}
