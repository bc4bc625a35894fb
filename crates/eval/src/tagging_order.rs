//! Does choosing which pictures to tag by hand pay? A simulation on a fully tagged set: a
//! seeded random few start out tagged, every other picture's tags are hidden; batches are
//! added, each chosen by a strategy (or at random), the method is refitted after each, and
//! the LRAP of its suggestions over the pictures still untagged is recorded.
//!
//! LRAP here ranks the whole vocabulary of the set: a tag no tagged picture carries yet can
//! not be suggested, so it ranks below every known tag (ties count against, as LRAP does).
//! That is what a person sees: the model cannot propose a tag it never learned.

use std::collections::BTreeMap;

use ndarray::{Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use tagweave_suggest::{
    choose_pictures_to_tag, group_ids, unit_rows, Standardiser, TagColumns, TaggingPool,
    TaggingStrategy, TrainSet,
};

use crate::metrics::{label_ranking_average_precision, mean};
use crate::runner::check_collection;
use crate::{EvalError, TagScorer};

/// Name of the random-picking baseline in [`TaggingOrder::methods`].
pub const RANDOM: &str = "random";
/// Keeps the simulation's random start independent of the split drawn from the same seed.
const START_SEED: u64 = 0x6f72_6465;

/// How many pictures are tagged when the model is refitted and measured.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TaggingOrderOptions {
    pub seed: u64,
    /// Tagged at random before any choosing.
    pub start: usize,
    /// Pictures added per batch.
    pub batch: usize,
    /// Last count measured (capped at a third of the set).
    pub until: usize,
}

impl Default for TaggingOrderOptions {
    fn default() -> Self {
        TaggingOrderOptions {
            seed: 7,
            start: 40,
            batch: 40,
            until: 240,
        }
    }
}

impl TaggingOrderOptions {
    /// Tagged counts at which the method is measured on a set of `n` pictures: `start`,
    /// then every `batch` up to `until` or a third of the set (whichever is smaller), which
    /// is always the last count.
    pub fn batches(&self, n: usize) -> Vec<usize> {
        let last = self.until.min(n / 3);
        if self.start == 0 || self.batch == 0 || last < self.start {
            return Vec::new();
        }
        let mut counts: Vec<usize> = (self.start..=last).step_by(self.batch).collect();
        if counts.last() != Some(&last) {
            counts.push(last);
        }
        counts
    }
}

/// One curve: LRAP over the still-untagged pictures after each batch.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TaggingCurve {
    pub lrap_after_batches: Vec<f64>,
}

/// Every strategy's curve beside random picking, on the same start.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TaggingOrder {
    /// Tagged pictures at each measurement.
    pub batches: Vec<usize>,
    /// By strategy name ([`TaggingStrategy::name`]) and [`RANDOM`].
    pub methods: BTreeMap<String, TaggingCurve>,
}

impl TaggingOrder {
    pub(crate) fn summary_line(&self) -> String {
        format!(
            "tagging order: {} pictures start tagged at random, then batches are chosen by each \
             way (or at random) and the suggester is refitted; LRAP over the pictures still \
             untagged, tags not yet learned ranked last",
            self.batches.first().copied().unwrap_or(0)
        )
    }

    pub(crate) fn columns(&self) -> Vec<String> {
        let mut columns = vec!["way".to_string()];
        columns.extend(self.batches.iter().map(|b| format!("{b} tagged")));
        columns.push("÷ random".to_string());
        columns
    }

    pub(crate) fn rows(&self) -> Vec<Vec<String>> {
        let random_last = self
            .methods
            .get(RANDOM)
            .and_then(|c| c.lrap_after_batches.last().copied());
        self.methods
            .iter()
            .map(|(name, curve)| {
                let mut row = vec![name.clone()];
                row.extend(curve.lrap_after_batches.iter().map(|v| format!("{v:.3}")));
                row.push(match (curve.lrap_after_batches.last(), random_last) {
                    (Some(v), Some(r)) if r > 0.0 => format!("{:.2}×", v / r),
                    _ => "–".to_string(),
                });
                row
            })
            .collect()
    }
}

/// Reported before each refit: `done` of `total` refits (every way, every batch) are over.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TaggingProgress<'a> {
    pub method: &'a str,
    pub done: usize,
    pub total: usize,
}

/// Runs the simulation for random picking and each of `strategies`, refitting a fresh
/// method from `make_method` after every batch. `tags[i]` (normalised) and `content_keys[i]`
/// belong to feature row `i`; only tagged pictures take part (an untagged one has no truth
/// to hide); a picture with the same content as a tagged one is never chosen.
/// Deterministic for the same inputs and seed.
pub fn simulate_tagging_order(
    features: ArrayView2<f32>,
    tags: &[Vec<String>],
    content_keys: &[String],
    options: &TaggingOrderOptions,
    strategies: &[TaggingStrategy],
    make_method: &dyn Fn() -> Box<dyn TagScorer>,
    on_progress: &mut dyn FnMut(TaggingProgress),
) -> Result<TaggingOrder, EvalError> {
    check_collection(features, tags, content_keys)?;
    let rows: Vec<usize> = (0..tags.len()).filter(|&i| !tags[i].is_empty()).collect();
    let features = features.select(Axis(0), &rows);
    let features = features.view();
    let tags: Vec<Vec<String>> = rows.iter().map(|&i| tags[i].clone()).collect();
    let tags = tags.as_slice();
    let content_keys: Vec<&String> = rows.iter().map(|&i| &content_keys[i]).collect();
    let n = features.nrows();
    let batches = options.batches(n);
    if batches.is_empty() {
        return Err(EvalError::TooFewToOrder {
            pictures: n,
            start: options.start,
        });
    }
    let vocabulary = TagColumns::from_items(tags.iter().map(Vec::as_slice));
    let groups = group_ids(&content_keys);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(options.seed ^ START_SEED));
    let simulation = Simulation {
        features,
        tags,
        groups: &groups,
        vocabulary: &vocabulary,
        seed: options.seed,
        batches: &batches,
        make_method,
    };
    let ways = std::iter::once(None).chain(strategies.iter().copied().map(Some));
    let total = (strategies.len() + 1) * batches.len();
    let mut methods = BTreeMap::new();
    for (index, strategy) in ways.enumerate() {
        let name = strategy.map_or(RANDOM, TaggingStrategy::name);
        let curve = simulation.run(&order, strategy, &mut |batch| {
            on_progress(TaggingProgress {
                method: name,
                done: index * batches.len() + batch,
                total,
            })
        })?;
        methods.insert(name.to_string(), curve);
    }
    Ok(TaggingOrder { batches, methods })
}

struct Simulation<'a> {
    features: ArrayView2<'a, f32>,
    tags: &'a [Vec<String>],
    groups: &'a [usize],
    vocabulary: &'a TagColumns,
    seed: u64,
    batches: &'a [usize],
    make_method: &'a dyn Fn() -> Box<dyn TagScorer>,
}

impl Simulation<'_> {
    /// `order`: the seeded random order; its first `batches[0]` pictures start tagged and,
    /// for random picking, each batch takes the next ones in it.
    /// `before_refit(b)` is called before the refit after batch `b`.
    fn run(
        &self,
        order: &[usize],
        strategy: Option<TaggingStrategy>,
        before_refit: &mut dyn FnMut(usize),
    ) -> Result<TaggingCurve, EvalError> {
        let n = self.features.nrows();
        let mut tagged = vec![false; n];
        order[..self.batches[0]]
            .iter()
            .for_each(|&i| tagged[i] = true);
        let mut curve = Vec::with_capacity(self.batches.len());
        for (b, &count) in self.batches.iter().enumerate() {
            before_refit(b);
            let (scaled, scores) = self.fit_and_score(&tagged)?;
            curve.push(self.untagged_lrap(&tagged, &scores)?);
            let Some(&next) = self.batches.get(b + 1) else {
                break;
            };
            let wanted = next - count;
            let chosen: Vec<usize> = match strategy {
                None => order
                    .iter()
                    .copied()
                    .filter(|&i| !tagged[i])
                    .take(wanted)
                    .collect(),
                Some(strategy) => {
                    let tagged_groups: std::collections::HashSet<usize> = (0..n)
                        .filter(|&i| tagged[i])
                        .map(|i| self.groups[i])
                        .collect();
                    let excluded: Vec<bool> = (0..n)
                        .map(|i| tagged_groups.contains(&self.groups[i]))
                        .collect();
                    let unit = unit_rows(scaled.view());
                    let pool = TaggingPool {
                        unit: unit.view(),
                        tagged: &tagged,
                        excluded: &excluded,
                        scores: Some(scores.view()),
                    };
                    let mut picks: Vec<usize> = choose_pictures_to_tag(&pool, strategy, wanted)
                        .into_iter()
                        .map(|p| p.row)
                        .collect();
                    // Near-duplicates are never proposed; a set made mostly of them is topped
                    // up in the random order so every curve is measured at the same counts.
                    let topped: Vec<usize> = order
                        .iter()
                        .copied()
                        .filter(|i| !tagged[*i] && !picks.contains(i))
                        .take(wanted - picks.len())
                        .collect();
                    picks.extend(topped);
                    picks
                }
            };
            chosen.iter().for_each(|&i| tagged[i] = true);
        }
        Ok(TaggingCurve {
            lrap_after_batches: curve,
        })
    }

    /// Fits a fresh method on the tagged pictures (standardised on them, as `train` does) and
    /// scores every picture. Returns the scaled features and the scores in the set's full
    /// vocabulary, tags unknown to the fit below every known one.
    fn fit_and_score(&self, tagged: &[bool]) -> Result<(Array2<f32>, Array2<f32>), EvalError> {
        let rows: Vec<usize> = (0..tagged.len()).filter(|&i| tagged[i]).collect();
        let standardiser = Standardiser::fit(self.features.select(Axis(0), &rows).view());
        let scaled = standardiser.apply(self.features);
        let known = TagColumns::from_items(rows.iter().map(|&i| self.tags[i].as_slice()));
        let train_tags: Vec<Vec<usize>> =
            rows.iter().map(|&i| known.encode(&self.tags[i])).collect();
        let train_groups: Vec<usize> = rows.iter().map(|&i| self.groups[i]).collect();
        let train_features = scaled.select(Axis(0), &rows);
        let mut method = (self.make_method)();
        method.fit(&TrainSet {
            features: train_features.view(),
            tags: &train_tags,
            n_tags: known.len(),
            groups: &train_groups,
            seed: self.seed,
            variants: &[],
        })?;
        let known_scores = method.score(scaled.view())?;
        crate::runner::check_scores(method.name(), &known_scores, scaled.nrows(), known.len())?;
        let floor = known_scores.iter().copied().fold(f32::INFINITY, f32::min) - 1.0;
        let mut scores = Array2::from_elem((scaled.nrows(), self.vocabulary.len()), floor);
        for (column, tag) in known.tags().iter().enumerate() {
            if let Some(full) = self.vocabulary.index_of(tag) {
                scores.column_mut(full).assign(&known_scores.column(column));
            }
        }
        Ok((scaled, scores))
    }

    fn untagged_lrap(&self, tagged: &[bool], scores: &Array2<f32>) -> Result<f64, EvalError> {
        let per_picture = (0..tagged.len()).filter(|&i| !tagged[i]).map(|i| {
            let mut truth = vec![false; self.vocabulary.len()];
            self.vocabulary
                .encode(&self.tags[i])
                .into_iter()
                .for_each(|c| truth[c] = true);
            label_ranking_average_precision(&scores.row(i).to_vec(), &truth)
        });
        mean(per_picture).ok_or(EvalError::NothingToMeasure)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::baselines::tests::synthetic;
    use crate::PriorScorer;
    use tagweave_suggest::KnnScorer;

    #[test]
    fn batches_run_from_the_start_to_a_third_of_the_set() {
        let o = TaggingOrderOptions::default();
        assert_eq!(o.batches(749), [40, 80, 120, 160, 200, 240]);
        assert_eq!(o.batches(359), [40, 80, 119]);
        assert_eq!(o.batches(300), [40, 80, 100]);
        assert!(o.batches(100).is_empty());
    }

    /// A small synthetic set whose features follow its tags (string tags, distinct keys).
    fn small_set(n: usize) -> (Array2<f32>, Vec<Vec<String>>, Vec<String>) {
        let (x, idx) = synthetic(n, 12, 0.2, 11);
        let tags = idx
            .iter()
            .map(|row| row.iter().map(|t| format!("tag-{t}")).collect())
            .collect();
        let keys = (0..x.nrows()).map(|i| format!("k{i}")).collect();
        (x, tags, keys)
    }

    #[test]
    fn every_curve_has_one_value_per_batch_and_is_reproducible() {
        let (x, tags, keys) = small_set(230);
        let options = TaggingOrderOptions {
            seed: 3,
            start: 20,
            batch: 20,
            until: 60,
        };
        let knn = || Box::new(KnnScorer::with_k_candidates(vec![5])) as Box<dyn TagScorer>;
        let run = || {
            simulate_tagging_order(
                x.view(),
                &tags,
                &keys,
                &options,
                &TaggingStrategy::ALL,
                &knn,
                &mut |_| {},
            )
            .unwrap()
        };
        let first = run();
        assert_eq!(first.batches, [20, 40, 60]);
        assert_eq!(first.methods.len(), 4);
        for curve in first.methods.values() {
            assert_eq!(curve.lrap_after_batches.len(), 3);
            assert!(curve
                .lrap_after_batches
                .iter()
                .all(|v| (0.0..=1.0).contains(v)));
        }
        // Same start for every method: the first value is the same fit on the same pictures.
        let starts: Vec<f64> = first
            .methods
            .values()
            .map(|c| c.lrap_after_batches[0])
            .collect();
        assert!(
            starts.iter().all(|s| (s - starts[0]).abs() < 1e-12),
            "{starts:?}"
        );
        assert_eq!(first, run());
    }

    #[test]
    fn unknown_tags_rank_below_every_known_one() {
        let x = Array2::from_shape_fn((9, 2), |(i, j)| (i * 2 + j) as f32);
        let tags: Vec<Vec<String>> = (0..9)
            .map(|i| vec![if i < 6 { "a" } else { "b" }.to_string()])
            .collect();
        let keys: Vec<String> = (0..9).map(|i| format!("k{i}")).collect();
        let sim = Simulation {
            features: x.view(),
            tags: &tags,
            groups: &group_ids(&keys),
            vocabulary: &TagColumns::from_items(tags.iter().map(Vec::as_slice)),
            seed: 1,
            batches: &[3],
            make_method: &|| Box::new(PriorScorer::default()),
        };
        // Tagged: three "a" pictures only. The prior knows only "a": every untagged "b"
        // picture has b ranked second of two → 1/2; every untagged "a" picture → 1.
        let tagged = [true, true, true, false, false, false, false, false, false];
        let (_, scores) = sim.fit_and_score(&tagged).unwrap();
        let lrap = sim.untagged_lrap(&tagged, &scores).unwrap();
        assert!(
            (lrap - (3.0 * 1.0 + 3.0 * 0.5) / 6.0).abs() < 1e-12,
            "{lrap}"
        );
    }

    // Untagged pictures take no part: with them added the curves are the same.
    #[test]
    fn untagged_pictures_are_left_out_of_the_simulation() {
        let (x, tags, keys) = small_set(120);
        let options = TaggingOrderOptions {
            seed: 5,
            start: 10,
            batch: 10,
            until: 30,
        };
        let prior = || Box::new(PriorScorer::default()) as Box<dyn TagScorer>;
        let run = |x: ArrayView2<f32>, tags: &[Vec<String>], keys: &[String]| {
            simulate_tagging_order(x, tags, keys, &options, &[], &prior, &mut |_| {}).unwrap()
        };
        let plain = run(x.view(), &tags, &keys);
        let mut more_x = x.clone();
        more_x.push_row(x.row(0)).unwrap();
        let mut more_tags = tags.clone();
        more_tags.push(Vec::new());
        let mut more_keys = keys.clone();
        more_keys.push("untagged".into());
        assert_eq!(run(more_x.view(), &more_tags, &more_keys), plain);
    }

    #[test]
    fn a_set_too_small_for_one_batch_is_refused_with_a_reason() {
        let (x, tags, keys) = small_set(200);
        let options = TaggingOrderOptions {
            start: 100,
            ..TaggingOrderOptions::default()
        };
        let err = simulate_tagging_order(
            x.view(),
            &tags,
            &keys,
            &options,
            &[],
            &|| Box::new(PriorScorer::default()),
            &mut |_| {},
        )
        .unwrap_err();
        assert!(err.to_string().contains("100"), "{err}");
    }
}
