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
    /// Learn only from the tags people wrote, leaving out suggestions a person accepted
    /// (marked so in the sidecars by `apply` and the review page).
    #[arg(long)]
    pub person_tags_only: bool,
}

pub fn run(args: &TrainArgs) -> anyhow::Result<Outcome> {
    let mut store = store_path::open_existing(args.store.store.as_deref())?;
    let options = TrainRunOptions {
        seed: args.seed,
        person_tags_only: args.person_tags_only,
        ..TrainRunOptions::default()
    };
    let (report, curve_path) = train_with_progress(&store, &options)?;
    crate::progress::compact_with_note(&mut store)?;
    // The first question after training would wait for these (8 s at a million pictures).
    crate::progress::with_spinner("preparing for questions", || {
        tagweave_query::Queries::open(&store)?.prepare()
    })?;
    if args.json {
        let mut value = serde_json::to_value(&report)?;
        value["curves"] = serde_json::json!(curve_path);
        // As `suggest` judges it: a calibration fitted on too few pictures does not count.
        value["calibrated"] =
            (report.calibrated && tagweave_query::enough_to_calibrate(report.pictures)).into();
        println!("{value}");
    } else {
        print_summary(&report, &curve_path);
    }
    Ok(Outcome::Done)
}

/// Trains, shows progress, writes the curve picture; returns the report and its path.
pub fn train_with_progress(
    store: &Store,
    options: &TrainRunOptions,
) -> anyhow::Result<(TrainReport, PathBuf)> {
    let progress = progress::Progress::new();
    let mut stages = TrainStages::new(options.joint.pretrain_epochs, options.joint.max_epochs);
    let report = tagweave_indexer::train(store, options, &mut |event| {
        for shown in stages.on(&event) {
            match shown {
                Shown::Stage { stage, done, total } => progress.show(&stage, done, total),
                Shown::Note(line) => progress.note(&line),
            }
        }
    })?;
    progress.finish();
    let trained = load_model(store)?.context("the model just trained is not in the store")?;
    let path = store.dir().join(CURVE_FILE);
    std::fs::write(&path, curve::render(&trained.history, report.epochs))
        .with_context(|| format!("cannot write the training curves to {}", path.display()))?;
    Ok((report, path))
}

/// What the progress bar shows: a stage with its count, or a line said above the bar.
#[derive(Debug, Clone, PartialEq)]
enum Shown {
    Stage {
        stage: String,
        done: usize,
        total: usize,
    },
    Note(String),
}

/// Turns training events into stages and notes: the trial run is named and explained once,
/// and when fine-tuning ends, why it ended is said (the bar alone would stop at 38/100).
struct TrainStages {
    pretrain_epochs: usize,
    max_epochs: usize,
    explained_trial: bool,
    /// The fine-tuning under way: its run and its last epoch (counted from 0).
    fine_tuning: Option<(TrainingRun, usize)>,
    /// Best held-out score of the trial run so far, and its epoch.
    best_trial: Option<(f32, usize)>,
}

impl TrainStages {
    fn new(pretrain_epochs: usize, max_epochs: usize) -> TrainStages {
        TrainStages {
            pretrain_epochs,
            max_epochs,
            explained_trial: false,
            fine_tuning: None,
            best_trial: None,
        }
    }

    /// Fine-tuning epochs of the final run: those the trial run chose (its best epoch),
    /// or all of them when there was no trial run.
    fn final_epochs(&self) -> usize {
        self.best_trial.map_or(self.max_epochs, |(_, e)| e + 1)
    }

    fn on(&mut self, event: &TrainProgress) -> Vec<Shown> {
        let mut shown = Vec::new();
        let still_fine_tuning = matches!(
            (event, self.fine_tuning),
            (TrainProgress::Model(run, JointProgress::FineTuning(_)), Some((was, _))) if *run == was
        );
        if !still_fine_tuning {
            shown.extend(self.end_fine_tuning());
        }
        let stage = |stage: &str, done: usize, total: usize| Shown::Stage {
            stage: stage.to_string(),
            done,
            total,
        };
        match event {
            TrainProgress::Model(run, JointProgress::Pretraining { layer, report }) => {
                if *run == TrainingRun::Choosing && !self.explained_trial {
                    self.explained_trial = true;
                    shown.push(Shown::Note(
                        "trial run: trains on most tagged pictures and checks on the rest how \
                         long to fine-tune; the final run then trains on all of them"
                            .into(),
                    ));
                }
                let name = match run {
                    TrainingRun::Choosing => format!("trial run: pretraining {layer} layer"),
                    TrainingRun::Final => format!("pretraining {layer} layer"),
                };
                shown.push(stage(&name, report.epoch + 1, self.pretrain_epochs));
            }
            TrainProgress::Model(run, JointProgress::FineTuning(r)) => {
                self.fine_tuning = Some((*run, r.epoch));
                let total = match run {
                    TrainingRun::Choosing => {
                        if let Some(score) = r.validation_score.filter(|s| s.is_finite()) {
                            if self.best_trial.is_none_or(|(best, _)| score > best) {
                                self.best_trial = Some((score, r.epoch));
                            }
                        }
                        self.max_epochs
                    }
                    TrainingRun::Final => self.final_epochs().max(r.epoch + 1),
                };
                let name = match run {
                    TrainingRun::Choosing => "trial run: fine-tuning",
                    TrainingRun::Final => "fine-tuning",
                };
                shown.push(stage(name, r.epoch + 1, total));
            }
            TrainProgress::Variants { done, total } => {
                shown.push(stage("describing variants", *done, *total));
            }
            TrainProgress::Coding { done, total } => {
                shown.push(stage("coding pictures", *done, *total));
            }
        }
        shown
    }

    /// Says how the fine-tuning under way ended, if one is.
    fn end_fine_tuning(&mut self) -> Option<Shown> {
        let (run, last) = self.fine_tuning.take()?;
        let ran = last + 1;
        let line = match run {
            TrainingRun::Choosing if ran < self.max_epochs => format!(
                "trial run: fine-tuning stopped after epoch {ran} of at most {}: the tag ranking \
                 of the held-out pictures had stopped improving (best at epoch {}), so the \
                 final run fine-tunes {} epochs",
                self.max_epochs,
                self.final_epochs(),
                self.final_epochs()
            ),
            TrainingRun::Choosing => format!(
                "trial run: fine-tuning ran all {ran} epochs (best at epoch {})",
                self.final_epochs()
            ),
            TrainingRun::Final => format!("fine-tuning done: {ran} epochs"),
        };
        Some(Shown::Note(line))
    }
}

pub fn print_summary(report: &TrainReport, curve_path: &std::path::Path) {
    println!(
        "Trained on {} tagged pictures ({} tags) in {:.1} s; {} untagged pictures coded too",
        report.pictures, report.tags, report.seconds, report.untagged
    );
    if let Some(all) = report.sampled_from {
        println!(
            "  sample      {} of the {all} tagged pictures, chosen at random (seeded): training \
             time grows with the pictures; every tagged picture still counts when suggesting",
            report.pictures
        );
    }
    if report.accepted_suggestions > 0 {
        println!(
            "  {} of the tags learned from were suggestions a person accepted \
             (`--person-tags-only` leaves them out)",
            report.accepted_suggestions
        );
    }
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
        if report.calibrated && tagweave_query::enough_to_calibrate(report.pictures) {
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
    print!("{TRAIN_LEGEND}");
}

/// The words of the summary, for people who do not train models for a living.
pub const TRAIN_LEGEND: &str = "\
Words used above:
  units                 the numbers a layer computes for each picture: the image layer
                        from its features, the tag layer from its tags, the shared layer
                        (the code) from both
  reconstruction error  how far a layer's rebuilding of what it was shown is from the
                        real thing (mean squared difference); lower means it learned a
                        pattern, not that suggestions are good
  tag ranking (LRAP)    on pictures held out from training: 1.0 when every tag a picture
                        carries is ranked above every tag it does not; higher is better
  loss                  what fine-tuning makes smaller; only its downward trend matters
  read-out              the part that turns a picture's code into tag scores
  calibrated            a stated 80 % comes true about 8 times in 10 on held-out pictures
  hash                  each code cut to one bit per value, to find near codes fast before
                        they are compared exactly
";

#[cfg(test)]
mod tests {
    use super::*;
    use tagweave_model::{EpochReport, FineTuneReport};

    fn pretraining(run: TrainingRun, layer: &'static str, epoch: usize) -> TrainProgress {
        TrainProgress::Model(
            run,
            JointProgress::Pretraining {
                layer,
                report: EpochReport {
                    epoch,
                    learning_rate: 0.1,
                    reconstruction_error: 0.5,
                    validation_error: None,
                },
            },
        )
    }

    fn fine_tuning(run: TrainingRun, epoch: usize, score: Option<f32>) -> TrainProgress {
        TrainProgress::Model(
            run,
            JointProgress::FineTuning(FineTuneReport {
                epoch,
                train_loss: 1.0,
                validation_score: score,
            }),
        )
    }

    fn notes(shown: &[Shown]) -> Vec<&str> {
        shown
            .iter()
            .filter_map(|s| match s {
                Shown::Note(line) => Some(line.as_str()),
                Shown::Stage { .. } => None,
            })
            .collect()
    }

    // A trial run that stops early at epoch 5 of 100 (best at epoch 3), then a final run of
    // 3 epochs: the trial run is named and explained once, its early end is said with the
    // reason, and the final run's bar ends full (3/3), never at 3/100.
    #[test]
    fn the_trial_run_is_explained_and_an_early_stop_is_said() {
        let mut stages = TrainStages::new(5, 100);
        let mut shown = Vec::new();
        for epoch in 0..5 {
            shown.extend(stages.on(&pretraining(TrainingRun::Choosing, "image", epoch)));
        }
        for (epoch, score) in [0.5, 0.6, 0.7, 0.65, 0.69].into_iter().enumerate() {
            shown.extend(stages.on(&fine_tuning(TrainingRun::Choosing, epoch, Some(score))));
        }
        shown.extend(stages.on(&pretraining(TrainingRun::Final, "image", 0)));
        for epoch in 0..3 {
            shown.extend(stages.on(&fine_tuning(TrainingRun::Final, epoch, None)));
        }
        shown.extend(stages.on(&TrainProgress::Coding { done: 0, total: 10 }));
        let said = notes(&shown);
        assert_eq!(said.len(), 3, "{said:#?}");
        assert!(said[0].starts_with("trial run: trains on most tagged pictures"));
        assert!(
            said[1].contains("stopped after epoch 5 of at most 100")
                && said[1].contains("best at epoch 3")
                && said[1].contains("final run fine-tunes 3 epochs"),
            "{}",
            said[1]
        );
        assert_eq!(said[2], "fine-tuning done: 3 epochs");
        let last_final = shown
            .iter()
            .rev()
            .find_map(|s| match s {
                Shown::Stage { stage, done, total } if stage == "fine-tuning" => {
                    Some((*done, *total))
                }
                _ => None,
            })
            .unwrap();
        assert_eq!(last_final, (3, 3));
        let trial_stage = shown.iter().find_map(|s| match s {
            Shown::Stage { stage, .. } => Some(stage.as_str()),
            Shown::Note(_) => None,
        });
        assert_eq!(trial_stage, Some("trial run: pretraining image layer"));
    }

    #[test]
    fn a_trial_run_that_ran_every_epoch_says_so() {
        let mut stages = TrainStages::new(5, 2);
        stages.on(&fine_tuning(TrainingRun::Choosing, 0, Some(0.5)));
        stages.on(&fine_tuning(TrainingRun::Choosing, 1, Some(0.6)));
        let shown = stages.on(&pretraining(TrainingRun::Final, "image", 0));
        assert_eq!(
            notes(&shown),
            ["trial run: fine-tuning ran all 2 epochs (best at epoch 2)"]
        );
    }
}
