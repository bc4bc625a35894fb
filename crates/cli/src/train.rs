//! `tagweave train`: learn the joint model from the tagged pictures of a store.

use std::path::PathBuf;

use anyhow::Context;
use tagweave_indexer::{load_model, TrainProgress, TrainReport, TrainRunOptions};
use tagweave_model::JointProgress;
use tagweave_store::Store;
use tagweave_suggest::TrainingRun;

use crate::exit::Outcome;
use crate::{curve, progress, store_path, StoreArgs};

/// File name of the training-curve picture, written inside the store folder.
pub const CURVE_FILE: &str = "training-curves.svg";

#[derive(clap::Args)]
pub struct TrainArgs {
    #[command(flatten)]
    pub store: StoreArgs,
    /// Print the summary as one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    /// Seed for every random choice of training (same seed, same model).
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
}

pub fn run(args: &TrainArgs) -> anyhow::Result<Outcome> {
    let store = store_path::open_existing(args.store.store.as_deref())?;
    let (report, curve_path) = train_with_progress(&store, args.seed)?;
    if args.json {
        let mut value = serde_json::to_value(&report)?;
        value["curves"] = serde_json::json!(curve_path);
        println!("{value}");
    } else {
        print_summary(&report, &curve_path);
    }
    Ok(Outcome::Done)
}

/// Trains, shows progress, writes the curve picture; returns the report and its path.
pub fn train_with_progress(store: &Store, seed: u64) -> anyhow::Result<(TrainReport, PathBuf)> {
    let bar = progress::bar("pretraining");
    let options = TrainRunOptions {
        seed,
        ..TrainRunOptions::default()
    };
    let max_epochs = options.joint.max_epochs as u64;
    let report = tagweave_indexer::train(store, &options, &mut |event| match event {
        TrainProgress::Model(run, JointProgress::Pretraining { layer, report }) => {
            bar.set_message(match (run, layer) {
                (TrainingRun::Choosing, _) => "pretraining (trial run)",
                (TrainingRun::Final, "image") => "pretraining image layer",
                (TrainingRun::Final, "tags") => "pretraining tag layer",
                (TrainingRun::Final, _) => "pretraining shared layer",
            });
            bar.set_length(options.joint.pretrain_epochs as u64);
            bar.set_position(report.epoch as u64 + 1);
        }
        TrainProgress::Model(run, JointProgress::FineTuning(r)) => {
            bar.set_message(match run {
                TrainingRun::Choosing => "fine-tuning (trial run)",
                TrainingRun::Final => "fine-tuning",
            });
            bar.set_length(max_epochs);
            bar.set_position(r.epoch as u64 + 1);
        }
        TrainProgress::Variants { done, total } => {
            bar.set_message("describing variants");
            bar.set_length(total as u64);
            bar.set_position(done as u64);
        }
        TrainProgress::Coding { done, total } => {
            bar.set_message("coding pictures");
            bar.set_length(total as u64);
            bar.set_position(done as u64);
        }
    })?;
    bar.finish_and_clear();
    let trained = load_model(store)?.context("the model just trained is not in the store")?;
    let path = store.dir().join(CURVE_FILE);
    std::fs::write(&path, curve::render(&trained.history, report.epochs))
        .with_context(|| format!("cannot write the training curves to {}", path.display()))?;
    Ok((report, path))
}

pub fn print_summary(report: &TrainReport, curve_path: &std::path::Path) {
    println!(
        "Trained on {} tagged pictures ({} tags) in {:.1} s; {} untagged pictures coded too",
        report.pictures, report.tags, report.seconds, report.untagged
    );
    let [image, tags, shared] = report.layers;
    println!("  layers      image {image} units, tags {tags} units, shared {shared} units");
    let pretrain: Vec<String> = report
        .final_reconstruction
        .iter()
        .map(|(layer, e)| format!("{layer} {e:.4}"))
        .collect();
    if !pretrain.is_empty() {
        println!(
            "  pretraining reconstruction error after the last epoch: {}",
            pretrain.join(", ")
        );
    }
    println!(
        "  fine-tuning {} epochs (chosen on held-out pictures{}), final loss {}",
        report.epochs,
        report
            .best_validation_lrap
            .map(|v| format!(", best tag ranking {v:.3}"))
            .unwrap_or_default(),
        report
            .final_loss
            .map_or_else(|| "-".to_string(), |l| format!("{l:.3}"))
    );
    let [readout, ridge, near] = report.picture_weights.map(|w| w * 100.0);
    println!(
        "  suggestions {readout:.0} % model read-out, {ridge:.0} % linear read-out, {near:.0} % \
         tags of the {} most similar pictures; {}",
        report.k,
        if report.calibrated {
            "probabilities calibrated on held-out pictures"
        } else {
            "too few held-out pictures to calibrate: scores are not probabilities"
        }
    );
    let [given, readout, ridge, near, together] = report.completion_weights.map(|w| w * 100.0);
    println!(
        "  for pictures with some tags: {given:.0} % model given those tags, {readout:.0} % \
         model read-out, {ridge:.0} % linear read-out, {near:.0} % similar pictures, \
         {together:.0} % tags seen together"
    );
    if report.without_variants > 0 {
        println!(
            "  variants    {} tagged pictures could not be read again; they trained without \
             mirrored and cropped variants",
            report.without_variants
        );
    }
    println!(
        "  codes       {} pictures, {} values and a {}-bit hash each",
        report.coded, report.layers[2], report.hash_bits
    );
    println!("  curves      {}", curve_path.display());
}
