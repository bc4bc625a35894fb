//! Ridge regression from picture features to tags: a baseline the joint model is
//! measured against, and the linear read-out the suggester may blend in when its
//! validation fold says so.

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::linalg::cholesky_solve;
use crate::train_set::{choose_by_cv, tag_matrix};
use crate::{SuggestError, TrainSet};

/// A fitted linear map from features to tag scores.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct RidgeModel {
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
    fn coefficients(&self, lambda: f64) -> Result<Array2<f64>, SuggestError> {
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

    fn model(self, lambda: f64) -> Result<RidgeModel, SuggestError> {
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
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
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

    /// Chooses λ by grouped cross-validation on `train`, then fits on all of it.
    pub fn fit(&mut self, train: &TrainSet) -> Result<(), SuggestError> {
        if self.candidates.is_empty() {
            return Err(SuggestError::NoCandidates("ridge strength lambda"));
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
                    Ok::<_, SuggestError>(affine(
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

    /// Tag scores (pictures × tags) of standardised features.
    pub fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, SuggestError> {
        let model = self
            .model
            .as_ref()
            .ok_or_else(|| SuggestError::NotFitted("ridge".into()))?;
        if features.ncols() != model.x_mean.len() {
            return Err(SuggestError::FeatureWidth {
                got: features.ncols(),
                expected: model.x_mean.len(),
            });
        }
        Ok(model.predict(features))
    }

    /// The λ picked by the last `fit`.
    pub fn chosen_lambda(&self) -> Option<f64> {
        self.lambda
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::synthetic;
    use ndarray::array;

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
