//! Tag completion measured: test pictures reveal ⌊n/2⌋ of their n tags and the
//! others are ranked. The two baselines that read revealed tags live here: tag
//! co-occurrence, and a blend of ridge (pixels) with co-occurrence whose weight a
//! validation fold of the train pictures chooses.

use ndarray::{Array2, ArrayView2, Axis};
use serde::Serialize;
use tagweave_suggest::{
    best_weights, completion_lrap, mix, unrevealed, validation_fold, validation_reveal,
    weight_grid, Reveal, RidgeScorer, SuggestError, TagCooccurrence, TrainRows, TrainSet,
};

use crate::metrics::{label_ranking_average_precision, mean, precision_at_k, recall_at_k};
use crate::{EvalError, TagScorer, SUGGESTIONS};

/// Offset deriving this baseline's reveal of the validation fold from the fit seed.
const VALIDATION_REVEAL_SEED: u64 = 0x626c_656e;

/// How well the hidden tags are ranked, the revealed ones left out of the ranking.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CompletionReport {
    pub settings: Option<String>,
    pub lrap: f64,
    pub p_at_1: f64,
    pub p_at_5: f64,
    pub r_at_5: f64,
    /// Wall-clock time of fit plus scoring.
    pub seconds: f64,
}

/// Every completion measure of `scores` (one row per revealing picture).
pub fn measure_completion(
    scores: ArrayView2<f32>,
    reveal: &Reveal,
) -> Result<CompletionReport, EvalError> {
    let rows = unrevealed(scores, reveal);
    let per_picture = |f: &dyn Fn(&[f32], &[bool]) -> f64| {
        mean(rows.iter().map(|(s, t)| f(s, t))).ok_or(EvalError::NothingToMeasure)
    };
    Ok(CompletionReport {
        settings: None,
        lrap: per_picture(&|s, t| label_ranking_average_precision(s, t))?,
        p_at_1: per_picture(&|s, t| precision_at_k(s, t, 1))?,
        p_at_5: per_picture(&|s, t| precision_at_k(s, t, SUGGESTIONS))?,
        r_at_5: per_picture(&|s, t| recall_at_k(s, t, SUGGESTIONS))?,
        seconds: 0.0,
    })
}

/// Tag co-occurrence of the revealed tags alone (see [`TagCooccurrence`]).
#[derive(Debug, Clone, Default)]
pub struct CooccurrenceScorer {
    counts: Option<TagCooccurrence>,
}

impl CooccurrenceScorer {
    fn counts(&self) -> Result<&TagCooccurrence, EvalError> {
        Ok(self
            .counts
            .as_ref()
            .ok_or_else(|| SuggestError::NotFitted("co-occurrence".into()))?)
    }
}

impl TagScorer for CooccurrenceScorer {
    fn name(&self) -> &str {
        "co-occurrence"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        self.counts = Some(TagCooccurrence::count(train.tags, train.n_tags));
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        Ok(self.counts()?.score(&vec![Vec::new(); features.nrows()]))
    }

    fn score_given(
        &self,
        _features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        Ok(self.counts()?.score(revealed))
    }

    fn completion_only(&self) -> bool {
        true
    }
}

/// Ridge from pixels blended with co-occurrence from the revealed tags; the weight is
/// chosen on a validation fold of the train pictures (never the test ones), on the
/// same grid the suggester's blends use.
#[derive(Debug, Clone, Default)]
pub struct RidgeCooccurrenceBlend {
    ridge: RidgeScorer,
    counts: Option<TagCooccurrence>,
    /// Weight of ridge; the rest goes to co-occurrence.
    weight: Option<f32>,
}

impl TagScorer for RidgeCooccurrenceBlend {
    fn name(&self) -> &str {
        "ridge+co-occurrence"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        let weight = match validation(train) {
            Some((fit, val, reveal)) => {
                let rows = TrainRows::of(train, &fit);
                let part = rows.train_set(train);
                let mut ridge = RidgeScorer::default();
                ridge.fit(&part)?;
                let pixels = ridge.score(train.features.select(Axis(0), &val).view())?;
                let tags = TagCooccurrence::count(part.tags, train.n_tags).score(&reveal.revealed);
                best_weights(&weight_grid(2), &[pixels.view(), tags.view()], |s| {
                    completion_lrap(s, &reveal)
                })[0]
            }
            None => 0.5,
        };
        self.ridge.fit(train)?;
        self.counts = Some(TagCooccurrence::count(train.tags, train.n_tags));
        self.weight = Some(weight);
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        self.score_given(features, &vec![Vec::new(); features.nrows()])
    }

    fn score_given(
        &self,
        features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        let (Some(weight), Some(counts)) = (self.weight, &self.counts) else {
            return Err(SuggestError::NotFitted(self.name().into()).into());
        };
        let pixels = self.ridge.score(features)?;
        let tags = counts.score(revealed);
        Ok(mix(&[pixels.view(), tags.view()], &[weight, 1.0 - weight]))
    }

    fn settings(&self) -> Option<String> {
        Some(format!(
            "lambda={} w={}",
            self.ridge.chosen_lambda()?,
            self.weight?
        ))
    }

    fn completion_only(&self) -> bool {
        true
    }
}

/// The suggester's validation fold of `train`: fit rows, validation rows with two or more
/// tags, and their reveal (a stream of its own).
fn validation(train: &TrainSet) -> Option<(Vec<usize>, Vec<usize>, Reveal)> {
    let (fit, val) = validation_fold(train)?;
    let (rows, reveal) = validation_reveal(train, &val, VALIDATION_REVEAL_SEED)?;
    Some((fit, rows, reveal))
}

#[cfg(test)]
mod tests {
    use super::*;

    // The blend by hand: train pictures {0,1}×3 and {2}×3, features one-hot-ish; with
    // the weight forced to 0 the blend is co-occurrence alone, with 1 it is ridge alone.
    #[test]
    fn blend_is_each_source_at_the_ends_of_its_weight() {
        let x = ndarray::array![
            [1.0f32, 0.0],
            [0.9, 0.1],
            [1.1, 0.0],
            [0.0, 1.0],
            [0.1, 0.9],
            [0.0, 1.1]
        ];
        let tags = vec![
            vec![0, 1],
            vec![0, 1],
            vec![0, 1],
            vec![2],
            vec![2],
            vec![2],
        ];
        let groups: Vec<usize> = (0..6).collect();
        let train = TrainSet {
            features: x.view(),
            tags: &tags,
            n_tags: 3,
            groups: &groups,
            seed: 1,
            variants: &[],
        };
        let mut blend = RidgeCooccurrenceBlend::default();
        TagScorer::fit(&mut blend, &train).unwrap();
        let revealed = vec![vec![0]];
        let probe = ndarray::array![[0.0f32, 1.0]];
        for (w, want) in [
            (0.0, TagCooccurrence::count(&tags, 3).score(&revealed)),
            (1.0, blend.ridge.score(probe.view()).unwrap()),
        ] {
            blend.weight = Some(w);
            let got = blend.score_given(probe.view(), &revealed).unwrap();
            assert!((&got - &want).iter().all(|d| d.abs() < 1e-6), "{w}: {got}");
        }
    }

    #[test]
    fn completion_scorers_refuse_before_fit() {
        let x = Array2::<f32>::zeros((1, 2));
        assert!(CooccurrenceScorer::default().score(x.view()).is_err());
        assert!(RidgeCooccurrenceBlend::default().score(x.view()).is_err());
    }
}
