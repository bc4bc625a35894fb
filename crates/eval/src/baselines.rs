//! The interface every evaluated method implements, and the baselines any
//! new method must beat: tag frequency, k-nearest-neighbour tag transfer and
//! ridge regression from features to tags.

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use tagweave_suggest::{
    choose_by_cv, tag_frequencies, tag_matrix, KnnScorer, SuggestError, TrainSet,
};

use crate::linalg::cholesky_solve;
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

/// A fitted linear map from features to tag scores.
#[derive(Debug, Clone)]
struct RidgeModel {
    x_mean: Array1<f64>,
    weights: Array2<f64>,
    y_mean: Array1<f64>,
}

impl RidgeModel {
    fn predict(&self, features: ArrayView2<f32>) -> Array2<f32> {
        let centred = features.mapv(f64::from) - &self.x_mean;
        affine(&centred, &self.weights, &self.y_mean)
    }
}

/// `inputs · coefficients + offset`, as f32 scores.
fn affine(inputs: &Array2<f64>, coefficients: &Array2<f64>, offset: &Array1<f64>) -> Array2<f32> {
    (inputs.dot(coefficients) + offset).mapv(|v| v as f32)
}

/// Ridge regression prepared once so several strengths solve cheaply: the
/// Gram matrix is built in whichever space is smaller — d×d (primal,
/// (XᵀX + αI)W = XᵀY) or n×n (dual, (XXᵀ + αI)A = Y, W = XᵀA); both give the
/// same W. Features and targets are centred, so the intercept is unpenalised.
struct RidgeSystem {
    x_mean: Array1<f64>,
    y_mean: Array1<f64>,
    xc: Array2<f64>,
    gram: Array2<f64>,
    rhs: Array2<f64>,
    dual: bool,
    /// α = λ · (mean squared norm of a centred feature column), so λ means the
    /// same thing whatever the number of pictures and the feature scale.
    alpha_unit: f64,
}

impl RidgeSystem {
    fn new(x: ArrayView2<f32>, y: ArrayView2<f32>) -> Self {
        let x = x.mapv(f64::from);
        let y = y.mapv(f64::from);
        let x_mean = x
            .mean_axis(Axis(0))
            .unwrap_or_else(|| Array1::zeros(x.ncols()));
        let y_mean = y
            .mean_axis(Axis(0))
            .unwrap_or_else(|| Array1::zeros(y.ncols()));
        let xc = x - &x_mean;
        let yc = y - &y_mean;
        let dual = xc.nrows() < xc.ncols();
        let (gram, rhs) = if dual {
            (xc.dot(&xc.t()), yc)
        } else {
            (xc.t().dot(&xc), xc.t().dot(&yc))
        };
        let mean_sq = gram.diag().sum() / xc.ncols().max(1) as f64;
        RidgeSystem {
            x_mean,
            y_mean,
            xc,
            gram,
            rhs,
            dual,
            alpha_unit: if mean_sq > 0.0 { mean_sq } else { 1.0 },
        }
    }

    /// Coefficients for strength λ: A in the dual, W in the primal.
    fn coefficients(&self, lambda: f64) -> Result<Array2<f64>, EvalError> {
        let mut a = self.gram.clone();
        a.diag_mut().mapv_inplace(|v| v + lambda * self.alpha_unit);
        cholesky_solve(a.view(), self.rhs.view())
    }

    /// New pictures in the space the coefficients act on: centred features
    /// (primal) or their dot products with the centred fit rows (dual), so
    /// cross-validation never forms the d×tags weight matrix.
    fn inputs(&self, x: ArrayView2<f32>) -> Array2<f64> {
        let centred = x.mapv(f64::from) - &self.x_mean;
        if self.dual {
            centred.dot(&self.xc.t())
        } else {
            centred
        }
    }

    fn model(self, lambda: f64) -> Result<RidgeModel, EvalError> {
        let coefficients = self.coefficients(lambda)?;
        Ok(RidgeModel {
            weights: if self.dual {
                self.xc.t().dot(&coefficients)
            } else {
                coefficients
            },
            x_mean: self.x_mean,
            y_mean: self.y_mean,
        })
    }
}

/// Ridge regression from features to the 0/1 tag matrix, strength λ chosen
/// by grouped 5-fold cross-validation on the train pictures (best LRAP).
#[derive(Debug, Clone)]
pub struct RidgeScorer {
    candidates: Vec<f64>,
    lambda: Option<f64>,
    model: Option<RidgeModel>,
}

impl Default for RidgeScorer {
    fn default() -> Self {
        Self::with_lambda_candidates(vec![0.01, 0.1, 1.0, 10.0, 100.0, 1000.0])
    }
}

impl RidgeScorer {
    /// λ candidates, relative to the mean squared column norm (see `RidgeSystem`).
    pub fn with_lambda_candidates(candidates: Vec<f64>) -> Self {
        RidgeScorer {
            candidates,
            lambda: None,
            model: None,
        }
    }

    /// The λ picked by the last `fit`.
    pub fn chosen_lambda(&self) -> Option<f64> {
        self.lambda
    }
}

impl TagScorer for RidgeScorer {
    fn name(&self) -> &str {
        "ridge"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        if self.candidates.is_empty() {
            return Err(SuggestError::NoCandidates("ridge strength lambda").into());
        }
        let y = tag_matrix(train.tags, train.n_tags);
        let choice = choose_by_cv(train, self.candidates.len(), |fit, val| {
            let system = RidgeSystem::new(
                train.features.select(Axis(0), fit).view(),
                y.select(Axis(0), fit).view(),
            );
            let inputs = system.inputs(train.features.select(Axis(0), val).view());
            self.candidates
                .par_iter()
                .map(|&lambda| {
                    Ok::<_, EvalError>(affine(
                        &inputs,
                        &system.coefficients(lambda)?,
                        &system.y_mean,
                    ))
                })
                .collect()
        })?;
        let lambda = self.candidates[choice];
        self.model = Some(RidgeSystem::new(train.features, y.view()).model(lambda)?);
        self.lambda = Some(lambda);
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        let model = self
            .model
            .as_ref()
            .ok_or_else(|| SuggestError::NotFitted(self.name().into()))?;
        Ok(model.predict(features))
    }

    fn settings(&self) -> Option<String> {
        self.lambda.map(|l| format!("lambda={l}"))
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use std::collections::BTreeSet;

    use super::*;
    use crate::metrics::{label_ranking_average_precision, mean};
    use ndarray::array;
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
            RidgeScorer::default().score(x.view()),
            Err(EvalError::Suggest(SuggestError::NotFitted(_)))
        ));
    }

    #[test]
    fn ridge_matches_closed_form_in_primal_and_dual() {
        // With λ fixed, W = (XcᵀXc + αI)⁻¹ XcᵀYc; a 1-D case worked by hand:
        // x = (-1, 0, 1), y = (0, 0, 1): Xc = x, Yc = y - 1/3, XcᵀXc = 2, XcᵀYc = 1,
        // α = λ·2/1 with λ = 0.5 → α = 1, w = 1/3; prediction at x = 2: 1/3 + 2/3 = 1.
        let x = array![[-1.0f32], [0.0], [1.0]];
        let y = array![[0.0f32], [0.0], [1.0]];
        let m = RidgeSystem::new(x.view(), y.view()).model(0.5).unwrap();
        assert!((m.weights[[0, 0]] - 1.0 / 3.0).abs() < 1e-12);
        assert!((m.predict(array![[2.0f32]].view())[[0, 0]] - 1.0).abs() < 1e-6);
        // more dimensions than pictures: the dual route must give the primal's weights
        let (xw, tags) = synthetic(6, 5, 0.3, 9);
        let y = tag_matrix(&tags, 5);
        let dual = RidgeSystem::new(xw.view(), y.view());
        assert!(dual.dual);
        let xc = xw.mapv(f64::from) - &dual.x_mean;
        let yc = y.mapv(f64::from) - &dual.y_mean;
        let mut a = xc.t().dot(&xc);
        a.diag_mut().mapv_inplace(|v| v + 0.1 * dual.alpha_unit);
        let probe = array![[0.5f32, -1.0, 2.0, 0.0, 1.0, 0.3, -0.2, 0.7, 0.1, -0.4]];
        let via_inputs = affine(
            &dual.inputs(probe.view()),
            &dual.coefficients(0.1).unwrap(),
            &dual.y_mean,
        );
        let model = dual.model(0.1).unwrap();
        assert!((&via_inputs - &model.predict(probe.view()))
            .iter()
            .all(|v| v.abs() < 1e-5));
        let w_dual = model.weights;
        let w_primal = cholesky_solve(a.view(), xc.t().dot(&yc).view()).unwrap();
        let diff = (&w_dual - &w_primal)
            .iter()
            .fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(diff < 1e-8, "{diff}");
    }
}
