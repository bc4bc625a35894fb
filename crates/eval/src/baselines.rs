//! The interface every evaluated method implements, and the baselines any
//! new method must beat: tag frequency, k-nearest-neighbour tag transfer and
//! ridge regression from features to tags.

use ndarray::{Array1, Array2, ArrayView2};
use tagweave_suggest::{tag_frequencies, KnnScorer, RidgeScorer, SuggestError, TrainSet};

use crate::EvalError;

/// A method that scores every vocabulary tag for pictures it sees only as features.
pub trait TagScorer {
    /// Key of the method in reports.
    fn name(&self) -> &str;
    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError>;
    /// Scores (pictures × vocabulary), higher = more likely; any scale.
    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError>;
    /// Settings chosen during `fit` (e.g. by cross-validation), for reports.
    fn settings(&self) -> Option<String> {
        None
    }
    /// Whether `score` returns calibrated probabilities (then the report gets a
    /// reliability table for it).
    fn calibrated(&self) -> bool {
        false
    }
    /// Scores for pictures that also reveal tags they carry (`revealed[i]`: tag columns
    /// of row `i`). Methods that read pixels only ignore them.
    fn score_given(
        &self,
        features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        let _ = revealed;
        self.score(features)
    }
    /// Further named answers to the same completion question, measured beside the
    /// method's own (e.g. one of its parts alone).
    fn completion_parts(
        &self,
        features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Vec<(String, Array2<f32>)>, EvalError> {
        let _ = (features, revealed);
        Ok(Vec::new())
    }
    /// Whether the method is measured on tag completion only (it needs revealed tags).
    fn completion_only(&self) -> bool {
        false
    }
}

/// Scores every tag by how many train pictures carry it; ignores the picture.
#[derive(Debug, Clone, Default)]
pub struct PriorScorer {
    frequency: Option<Array1<f32>>,
}

impl TagScorer for PriorScorer {
    fn name(&self) -> &str {
        "prior"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        self.frequency = Some(tag_frequencies(train.tags.iter(), train.n_tags));
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        let freq = self
            .frequency
            .as_ref()
            .ok_or_else(|| SuggestError::NotFitted(self.name().into()))?;
        Ok(Array2::from_shape_fn(
            (features.nrows(), freq.len()),
            |(_, t)| freq[t],
        ))
    }
}

impl TagScorer for KnnScorer {
    fn name(&self) -> &str {
        "knn"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        Ok(KnnScorer::fit(self, train)?)
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        Ok(KnnScorer::score(self, features)?)
    }

    fn settings(&self) -> Option<String> {
        self.chosen_k().map(|k| format!("k={k}"))
    }
}

impl TagScorer for RidgeScorer {
    fn name(&self) -> &str {
        "ridge"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        Ok(RidgeScorer::fit(self, train)?)
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        Ok(RidgeScorer::score(self, features)?)
    }

    fn settings(&self) -> Option<String> {
        self.chosen_lambda().map(|l| format!("lambda={l}"))
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use std::collections::BTreeSet;

    use super::*;
    use crate::metrics::{label_ranking_average_precision, mean};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Pictures whose features are a noisy one-hot of their tags plus pure-noise dimensions.
    pub(crate) fn synthetic(
        n: usize,
        n_tags: usize,
        noise: f32,
        seed: u64,
    ) -> (Array2<f32>, Vec<Vec<usize>>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let tags: Vec<Vec<usize>> = (0..n)
            .map(|_| {
                let count = rng.random_range(1..=3);
                let set: BTreeSet<usize> =
                    (0..count).map(|_| rng.random_range(0..n_tags)).collect();
                set.into_iter().collect()
            })
            .collect();
        let mut x = Array2::from_shape_fn((n, 2 * n_tags), |_| rng.random_range(-noise..noise));
        for (i, row) in tags.iter().enumerate() {
            row.iter().for_each(|&t| x[[i, t]] += 1.0);
        }
        (x, tags)
    }

    fn mean_lrap(scores: ArrayView2<f32>, tags: &[Vec<usize>]) -> f64 {
        mean(scores.outer_iter().zip(tags).map(|(row, t)| {
            let mut rel = vec![false; row.len()];
            t.iter().for_each(|&j| rel[j] = true);
            label_ranking_average_precision(&row.to_vec(), &rel)
        }))
        .unwrap()
    }

    fn fit_and_score(method: &mut dyn TagScorer, n_tags: usize, seed: u64) -> f64 {
        let (x, tags) = synthetic(240, n_tags, 0.6, seed);
        let groups: Vec<usize> = (0..180).collect();
        let train = TrainSet {
            features: x.slice(ndarray::s![..180, ..]),
            tags: &tags[..180],
            n_tags,
            groups: &groups,
            seed,
            variants: &[],
        };
        method.fit(&train).unwrap();
        let scores = method.score(x.slice(ndarray::s![180.., ..])).unwrap();
        assert_eq!(scores.dim(), (60, n_tags));
        mean_lrap(scores.view(), &tags[180..])
    }

    #[test]
    fn learned_baselines_beat_prior_on_informative_features() {
        let prior = fit_and_score(&mut PriorScorer::default(), 10, 3);
        let mut knn = KnnScorer::default();
        let knn_lrap = fit_and_score(&mut knn, 10, 3);
        let mut ridge = RidgeScorer::default();
        let ridge_lrap = fit_and_score(&mut ridge, 10, 3);
        assert!(prior < 0.6, "prior {prior}");
        assert!(
            knn_lrap > 0.85 && ridge_lrap > 0.85,
            "knn {knn_lrap} ridge {ridge_lrap}"
        );
        assert!(
            knn.chosen_k().unwrap() > 1,
            "noisy features should not favour k=1"
        );
        assert!(ridge.chosen_lambda().is_some());
    }

    #[test]
    fn scorers_refuse_to_score_before_fit() {
        let x = Array2::<f32>::zeros((2, 3));
        assert!(matches!(
            PriorScorer::default().score(x.view()),
            Err(EvalError::Suggest(SuggestError::NotFitted(_)))
        ));
        assert!(matches!(
            TagScorer::score(&KnnScorer::default(), x.view()),
            Err(EvalError::Suggest(SuggestError::NotFitted(_)))
        ));
        assert!(matches!(
            TagScorer::score(&RidgeScorer::default(), x.view()),
            Err(EvalError::Suggest(SuggestError::NotFitted(_)))
        ));
    }
}
