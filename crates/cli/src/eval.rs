//! `tagweave eval`: scan a tagged folder, then measure the suggester beside the baselines.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context};
use serde::Serialize;
use tagweave_collection::ItemRecord;
use tagweave_eval::{
    run_experiment, simulate_tagging_order, Collection, EvalOptions, JointScorer, Progress,
    TagScorer, TaggingOrder, TaggingOrderOptions,
};
use tagweave_indexer::variant_features;
use tagweave_model::{JointOptions, TagUnits};
use tagweave_store::FeatureTable;
use tagweave_suggest::TaggingStrategy;

use crate::exit::Outcome;
use crate::progress;
use crate::scan::{open_for_scan, scan_with_progress, ScanArgs};

/// Fewest tagged pictures worth splitting into a train and a test part.
const MIN_TAGGED: usize = 8;
/// The column of the known-mislabels file that marks a wrong tag.
const FALSE_TAGS: &str = "false_tags";

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
    /// Also measure how well real wrong tags are found. FILE is a CSV whose first column is
    /// the picture's path inside FOLDER and whose `false_tags` column is non-empty for
    /// pictures known to carry a wrong tag (pictures not listed count as correctly tagged).
    /// Every tagged picture is judged by methods fitted on the other 4 of 5 folds, so its
    /// own tags are never seen when it is judged.
    #[arg(long, value_name = "FILE")]
    pub known_mislabels: Option<PathBuf>,
    /// Also simulate which pictures are best tagged by hand first: from a few tagged at
    /// random, batches chosen by each way `to-tag` offers (and at random) are added and the
    /// suggester refitted; reports its LRAP over the pictures still untagged. Slow: one
    /// training per batch and way.
    #[arg(long)]
    pub tagging_order: bool,
    /// Also count tags that were suggestions a person accepted (marked so in the sidecars)
    /// as the truth to score against. Left out by default: the model would be scored against
    /// what it once suggested itself.
    #[arg(long)]
    pub with_accepted_suggestions: bool,
    /// Print one JSON object instead of a table.
    #[arg(long, conflicts_with = "markdown")]
    pub json: bool,
    /// Print a Markdown table (for BENCHMARKS.md).
    #[arg(long)]
    pub markdown: bool,
    /// How the joint model's tag pathway sees a bag of tags (an experiment switch).
    #[arg(long, value_enum, default_value_t = TagLayerChoice::Binary, hide = true)]
    pub tag_layer: TagLayerChoice,
    /// Mean-field steps of the joint model's fill-in (an experiment switch; the default
    /// is the one `train` uses).
    #[arg(long, value_name = "N", default_value_t = JointOptions::default().mean_field_steps,
          hide = true)]
    pub mean_field_steps: usize,
    /// Chance that the joint model sees a training picture through a variant (mirror or
    /// centre crop) instead of the original, each epoch (an experiment switch; 0 = off).
    #[arg(long, value_name = "X", default_value_t = JointOptions::default().variant_share,
          hide = true)]
    pub variant_share: f32,
    /// Whether the joint model also trains on every variant as an example of its own (an
    /// experiment switch).
    #[arg(long, value_name = "BOOL", action = clap::ArgAction::Set,
          default_value_t = JointOptions::default().variant_rows, hide = true)]
    pub variant_rows: bool,
}

/// The table's column names, for people who do not measure models for a living. Each
/// measure is over the test pictures, which no method saw while learning; "higher is
/// better" unless said.
pub const EVAL_LEGEND: &str = "\
Columns (on the test pictures, held back while the methods learned; higher is better
unless said):
  joint, knn, prior, ridge  the methods: tagweave's model; the tags of the most similar
                pictures; each tag's frequency (a picture-blind floor); a linear fit
  LRAP          label ranking average precision: 1.0 when every tag a picture carries is
                ranked above every tag it does not
  P@1, P@5      share of the top 1 / top 5 suggested tags that the picture carries
  R@5           share of a picture's tags found among its top 5 suggestions
  coverage      how far down the ranking one must read to see all of a picture's tags
                (lower is better)
  tag P, tag R  precision and recall per tag of the top 5 suggestions, averaged over tags
  N+            how many tags were suggested correctly at least once
  search mAP    mean average precision of finding pictures by one tag; pair mAP: by two
  mislabel AUC  chance that a picture given wrong tags on purpose is ranked more doubtful
                than a correctly tagged one (0.5 is chance); mislabel P: share of wrong
                ones among the most doubtful
  seconds       time to learn and to score
";

#[derive(clap::ValueEnum, Clone, Copy, Debug)]
pub enum TagLayerChoice {
    /// One logistic unit per tag.
    Binary,
    /// Replicated softmax over the vocabulary.
    Softmax,
}

impl EvalArgs {
    /// The arguments a plain `tagweave eval FOLDER` would have, with `known_mislabels`.
    pub fn plain(folder: PathBuf, known_mislabels: Option<PathBuf>) -> EvalArgs {
        let joint = JointOptions::default();
        EvalArgs {
            folder,
            seed: 7,
            train_fraction: 0.75,
            known_mislabels,
            tagging_order: false,
            with_accepted_suggestions: false,
            json: false,
            markdown: false,
            tag_layer: TagLayerChoice::Binary,
            mean_field_steps: joint.mean_field_steps,
            variant_share: joint.variant_share,
            variant_rows: joint.variant_rows,
        }
    }

    fn joint_options(&self) -> JointOptions {
        JointOptions {
            tag_units: match self.tag_layer {
                TagLayerChoice::Binary => TagUnits::Binary,
                TagLayerChoice::Softmax => TagUnits::ReplicatedSoftmax,
            },
            mean_field_steps: self.mean_field_steps,
            variant_share: self.variant_share,
            variant_rows: self.variant_rows,
            ..JointOptions::default()
        }
    }
}

pub fn run(args: &EvalArgs) -> anyhow::Result<Outcome> {
    let scan_args = ScanArgs::plain(args.folder.clone());
    let store = open_for_scan(&scan_args)?;
    scan_with_progress(&store, &scan_args.options())?;
    let table = FeatureTable::load(&store)?;
    let (tags, left_out) = truth_tags(&table.items, args.with_accepted_suggestions);
    let tagged = tags.iter().filter(|t| !t.is_empty()).count();
    if tagged < MIN_TAGGED {
        bail!(
            "{} has only {tagged} tagged pictures, too few to hold some back and measure; \
             tag at least {MIN_TAGGED}",
            args.folder.display()
        );
    }
    // Read before the long work so a wrong file fails at once.
    let known = match &args.known_mislabels {
        Some(file) => {
            let text = std::fs::read_to_string(file).with_context(|| {
                format!("cannot read the known-mislabels file {}", file.display())
            })?;
            let paths: Vec<&str> = table.items.iter().map(|i| i.rel_path.as_str()).collect();
            Some(known_mislabels(&text, file, &args.folder, &paths)?)
        }
        None => None,
    };
    let joint = args.joint_options();
    // Variants of every picture, decoded again from the folder; only the train pictures'
    // reach the joint model. A picture that no longer decodes trains as itself.
    let variants = if joint.variant_share > 0.0 || joint.variant_rows {
        let progress = progress::Progress::new();
        let (variants, _) = variant_features(
            &store,
            &table.items,
            table.features.view(),
            &mut |done, total| progress.show("describing variants", done, total),
        )?;
        progress.finish();
        variants
    } else {
        Vec::new()
    };
    let variants: Vec<_> = variants.iter().map(|v| v.view()).collect();
    let keys: Vec<String> = table.items.iter().map(|i| i.content_hash.clone()).collect();
    let collection = Collection {
        features: table.features.view(),
        variants: &variants,
        tags: &tags,
        content_keys: &keys,
        known_mislabels: known.as_deref(),
    };
    let options = EvalOptions {
        seed: args.seed,
        train_fraction: args.train_fraction,
        ..EvalOptions::default()
    };
    let progress = progress::Progress::new();
    let mut report = run_experiment(&collection, &options, &joint, &mut |event| match event {
        Progress::Fitting { index, total, .. } => {
            progress.show("measuring methods", 2 * index, 2 * total)
        }
        Progress::Measuring { index, total, .. } => {
            progress.show("measuring methods", 2 * index + 1, 2 * total)
        }
        Progress::Auditing { fold, folds } => progress.show("auditing out of fold", fold, folds),
    })?;
    progress.finish();
    if let (Some(measured), Some(file)) = (&report.known_mislabels, &args.known_mislabels) {
        if measured.known == 0 {
            bail!(
                "{} marks no tagged picture of {} as carrying a wrong tag, so there is nothing \
                 to find; fill its `{FALSE_TAGS}` column for the pictures known to be mislabelled",
                file.display(),
                args.folder.display()
            );
        }
    }
    if args.tagging_order {
        report.tagging_order = Some(simulate_order(&collection, args.seed, &joint)?);
    }
    if args.json {
        #[derive(Serialize)]
        struct WithProvenance<'a> {
            /// Tags left out of the truth because a person accepted them as suggestions.
            accepted_suggestions_left_out: usize,
            #[serde(flatten)]
            report: &'a tagweave_eval::Report,
        }
        let json = WithProvenance {
            accepted_suggestions_left_out: left_out,
            report: &report,
        };
        println!("{}", serde_json::to_string(&json)?);
    } else if args.markdown {
        print!("{}", report.to_markdown());
    } else {
        if left_out > 0 {
            println!(
                "{left_out} tags were suggestions a person accepted; they are left out of \
                 what is scored (add --with-accepted-suggestions to count them)."
            );
        }
        print!("{}", report.to_table());
        print!("{EVAL_LEGEND}");
    }
    Ok(Outcome::Done)
}

/// Each item's tags to learn from and score against, and how many accepted suggestions were
/// left out of them (none with `with_accepted`).
fn truth_tags(items: &[ItemRecord], with_accepted: bool) -> (Vec<Vec<String>>, usize) {
    let tags: Vec<Vec<String>> = items
        .iter()
        .map(|i| {
            if with_accepted {
                i.tags.clone()
            } else {
                i.person_tags()
            }
        })
        .collect();
    let all: usize = items.iter().map(|i| i.tags.len()).sum();
    let kept: usize = tags.iter().map(Vec::len).sum();
    (tags, all - kept)
}

/// The tagging-order simulation for the product's suggester, with every way of choosing.
fn simulate_order(
    collection: &Collection,
    seed: u64,
    joint: &JointOptions,
) -> anyhow::Result<TaggingOrder> {
    let progress = progress::Progress::new();
    let make = || Box::new(JointScorer::with_options(joint.clone())) as Box<dyn TagScorer>;
    let options = TaggingOrderOptions {
        seed,
        ..TaggingOrderOptions::default()
    };
    let order = simulate_tagging_order(
        collection.features,
        collection.tags,
        collection.content_keys,
        &options,
        &TaggingStrategy::ALL,
        &make,
        &mut |p| {
            progress.show(
                "simulating tagging order (one training per batch and way)",
                p.done,
                p.total,
            )
        },
    )?;
    progress.finish();
    Ok(order)
}

/// One flag per picture of `rel_paths`: does the known-mislabels file
/// (`text`, read from `file`) list it with a non-empty `false_tags` cell?
fn known_mislabels(
    text: &str,
    file: &Path,
    folder: &Path,
    rel_paths: &[&str],
) -> anyhow::Result<Vec<bool>> {
    let records = parse_csv(text).map_err(|e| anyhow::anyhow!("{}: {e}", file.display()))?;
    let Some((header_line, header)) = records.first() else {
        bail!(
            "{} is empty; it needs a header line naming a `{FALSE_TAGS}` column",
            file.display()
        );
    };
    let Some(column) = header.iter().position(|h| h.trim() == FALSE_TAGS) else {
        bail!(
            "{} line {header_line}: the header has no `{FALSE_TAGS}` column; name the column \
             that is non-empty for pictures known to carry a wrong tag `{FALSE_TAGS}`",
            file.display()
        );
    };
    let index: HashMap<&str, usize> = rel_paths
        .iter()
        .enumerate()
        .map(|(i, &path)| (path, i))
        .collect();
    let mut known = vec![false; rel_paths.len()];
    for (line, fields) in &records[1..] {
        let path = fields[0].trim().replace('\\', "/");
        let path = path.trim_start_matches("./");
        let Some(&i) = index.get(path) else {
            bail!(
                "{} line {line}: `{path}` is not a picture indexed in {}; the first column must \
                 be a picture's path inside that folder, such as `{}`",
                file.display(),
                folder.display(),
                rel_paths.first().unwrap_or(&"photos/a.jpg")
            );
        };
        let Some(cell) = fields.get(column) else {
            bail!(
                "{} line {line}: the row has {} fields but `{FALSE_TAGS}` is field {}; give \
                 every row as many fields as the header",
                file.display(),
                fields.len(),
                column + 1
            );
        };
        known[i] |= !cell.trim().is_empty();
    }
    Ok(known)
}

/// Records of a comma-separated file (RFC 4180: fields may be quoted, `""`
/// inside quotes is one quote, quoted fields may span lines), each with the
/// line it starts on; blank lines are skipped.
fn parse_csv(text: &str) -> Result<Vec<(usize, Vec<String>)>, String> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut records = Vec::new();
    let (mut fields, mut field) = (Vec::new(), String::new());
    let (mut line, mut start, mut quoted) = (1, 1, false);
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        match (quoted, c) {
            (true, '"') if chars.peek() == Some(&'"') => {
                chars.next();
                field.push('"');
            }
            (true, '"') => quoted = false,
            (false, '"') if field.is_empty() => quoted = true,
            (false, ',') => fields.push(std::mem::take(&mut field)),
            (false, '\r') if chars.peek() == Some(&'\n') => {}
            (false, '\n') => {
                fields.push(std::mem::take(&mut field));
                if fields.iter().any(|f| !f.is_empty()) {
                    records.push((start, std::mem::take(&mut fields)));
                }
                fields.clear();
                line += 1;
                start = line;
            }
            (_, c) => {
                if c == '\n' {
                    line += 1;
                }
                field.push(c);
            }
        }
    }
    if quoted {
        return Err(format!(
            "the quoted field opened on line {start} is never closed; add the closing `\"`"
        ));
    }
    fields.push(field);
    if fields.iter().any(|f| !f.is_empty()) {
        records.push((start, fields));
    }
    Ok(records)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strings(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn accepted_suggestions_are_left_out_of_the_truth_unless_asked() {
        let item = |tags: &[&str], accepted: &[&str]| ItemRecord {
            id: String::new(),
            rel_path: String::new(),
            format: tagweave_collection::ImageFormat::Png,
            stamp: tagweave_collection::FileStamp {
                size: 0,
                mtime_ns: 0,
            },
            content_hash: String::new(),
            sidecars: Vec::new(),
            tags: strings(tags),
            accepted: strings(accepted),
        };
        let items = [
            item(&["harbour", "sea", "night"], &["sea"]),
            item(&["boats"], &["boats"]),
            item(&["fog"], &[]),
        ];
        let (person, left_out) = truth_tags(&items, false);
        assert_eq!(
            person,
            [strings(&["harbour", "night"]), vec![], strings(&["fog"])]
        );
        assert_eq!(left_out, 2);
        let (all, none) = truth_tags(&items, true);
        assert_eq!(all[0], strings(&["harbour", "sea", "night"]));
        assert_eq!(none, 0);
    }

    #[test]
    fn csv_records_follow_rfc_4180() {
        // source: RFC 4180 §2 rules 5–7 (quoted fields, "" escapes, line breaks inside quotes)
        let text = "\u{feff}file,false_tags\r\na.jpg,\r\n\r\n\"b, c.jpg\",\"say \"\"rain\"\"\"\n\"d\n.jpg\",x";
        let records = parse_csv(text).unwrap();
        assert_eq!(
            records,
            vec![
                (1, strings(&["file", "false_tags"])),
                (2, strings(&["a.jpg", ""])),
                (4, strings(&["b, c.jpg", "say \"rain\""])),
                (5, strings(&["d\n.jpg", "x"])),
            ]
        );
        assert!(parse_csv("a,\"open\nb").unwrap_err().contains("line 1"));
    }

    #[test]
    fn known_mislabels_are_matched_by_path_and_errors_name_the_line() {
        let (file, folder) = (Path::new("truth.csv"), Path::new("archive"));
        let paths = ["1950s/a.png", "1950s/b.jpg", "c.jpg"];
        let text =
            "file,sidecar,false_tags\n1950s/a.png,txt,rain\n./1950s/b.jpg,txt,\nc.jpg,none, \n";
        let known = known_mislabels(text, file, folder, &paths).unwrap();
        assert_eq!(known, vec![true, false, false]);

        let unknown = "file,false_tags\n1950s/a.png,rain\n1950s/zz.png,fog\n";
        let e = known_mislabels(unknown, file, folder, &paths)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("truth.csv line 3") && e.contains("`1950s/zz.png`"),
            "{e}"
        );
        assert!(e.contains("archive") && e.contains("`1950s/a.png`"), "{e}");

        let e = known_mislabels("file,wrong\nc.jpg,x\n", file, folder, &paths).unwrap_err();
        assert!(e.to_string().contains("no `false_tags` column"), "{e}");
        let e = known_mislabels("file,x,false_tags\nc.jpg\n", file, folder, &paths).unwrap_err();
        assert!(
            e.to_string().contains("line 2: the row has 1 fields"),
            "{e}"
        );
        let e = known_mislabels("", file, folder, &paths).unwrap_err();
        assert!(e.to_string().contains("is empty"), "{e}");
    }
}
