//! tagweave's own joint picture–tag model, measured like the baselines.

use ndarray::{Array2, ArrayView2, Axis};
use tagweave_model::{JointModel, JointOptions, ModelError};

use crate::baselines::grouped_folds;
use crate::metrics::{label_ranking_average_precision, mean};
use crate::{EvalError, KnnScorer, TagScorer, TrainSet};

/// One fold in this many of the train pictures (content groups kept whole)
/// decides when fine-tuning stops: about 14 %.
const VALIDATION_FOLDS: usize = 7;

/// Weights of the read-out tried against kNN tag transfer (1 = read-out only).
const BLEND_WEIGHTS: [f32; 5] = [1.0, 0.75, 0.5, 0.25, 0.0];

/// Tag suggestions read out of [`JointModel`] from pictures alone, optionally
/// blended with kNN tag transfer on the picture features.
///
/// The blend uses the features, not the shared code: on the two shared eval
/// sets (seed 7), kNN in the shared code added nothing to the read-out (the
/// validation fold chose weight 1, or the blend lost 0.004 LRAP); kNN on the
/// features added 0.00–0.04 LRAP over seeds 1, 2, 3 and 7.
///
/// Fine-tuning length (and the blend weight) are chosen by LRAP on a grouped
/// validation fold of the train pictures; the model is then trained again on
/// all of them for that many epochs, so no train picture is lost to validation.
#[derive(Debug, Clone, Default)]
pub struct JointScorer {
    options: JointOptions,
    blend: bool,
    fitted: Option<Fitted>,
}

#[derive(Debug, Clone)]
struct Fitted {
    model: JointModel,
    epochs: usize,
    /// Read-out weight and the kNN fitted on the train pictures' shared codes.
    knn: Option<(f32, KnnScorer)>,
}

impl JointScorer {
    pub fn with_options(options: JointOptions) -> Self {
        Self {
            options,
            ..Self::default()
        }
    }

    /// The "joint+knn" variant: read-out blended with kNN on the features.
    pub fn blended_with_knn(self) -> Self {
        Self {
            blend: true,
            ..self
        }
    }
}

/// 0/1 matrix (pictures × vocabulary) of the tag lists.
fn tag_matrix(tags: &[Vec<usize>], n_tags: usize) -> Array2<f32> {
    let mut y = Array2::zeros((tags.len(), n_tags));
    for (i, row) in tags.iter().enumerate() {
        row.iter().for_each(|&t| y[[i, t]] = 1.0);
    }
    y
}

fn mean_lrap(scores: ArrayView2<f32>, relevant: &[Vec<bool>]) -> f64 {
    mean(
        scores
            .outer_iter()
            .zip(relevant)
            .map(|(row, rel)| label_ranking_average_precision(&row.to_vec(), rel)),
    )
    .unwrap_or(0.0)
}

/// Each row divided by its largest entry, so both sources put their top tag at 1
/// and the blend weight means the same for every picture.
fn row_max_scaled(mut scores: Array2<f32>) -> Array2<f32> {
    for mut row in scores.outer_iter_mut() {
        let top = row.fold(0.0f32, |m, &v| m.max(v));
        if top > 0.0 {
            row /= top;
        }
    }
    scores
}

fn blend(readout: Array2<f32>, knn: Array2<f32>, weight: f32) -> Array2<f32> {
    row_max_scaled(readout) * weight + row_max_scaled(knn) * (1.0 - weight)
}

/// The baseline kNN fitted on the given train pictures' features.
fn knn_on(train: &TrainSet, rows: &[usize]) -> Result<KnnScorer, EvalError> {
    let features = train.features.select(Axis(0), rows);
    let tags: Vec<Vec<usize>> = rows.iter().map(|&i| train.tags[i].clone()).collect();
    let groups: Vec<usize> = rows.iter().map(|&i| train.groups[i]).collect();
    let mut knn = KnnScorer::default();
    knn.fit(&TrainSet {
        features: features.view(),
        tags: &tags,
        groups: &groups,
        ..*train
    })?;
    Ok(knn)
}

fn model_error(method: &str, source: ModelError) -> EvalError {
    EvalError::Model {
        method: method.into(),
        source,
    }
}

impl TagScorer for JointScorer {
    fn name(&self) -> &str {
        if self.blend {
            "joint+knn"
        } else {
            "joint"
        }
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        let name = self.name().to_string();
        let fail = |e| model_error(&name, e);
        let y = tag_matrix(train.tags, train.n_tags);
        let options = JointOptions {
            seed: train.seed,
            ..self.options.clone()
        };
        let all_rows: Vec<usize> = (0..train.tags.len()).collect();
        let (epochs, weight) = match grouped_folds(train.groups, VALIDATION_FOLDS, train.seed)
            .first()
        {
            Some(val) => {
                let fit: Vec<usize> = all_rows
                    .iter()
                    .copied()
                    .filter(|i| val.binary_search(i).is_err())
                    .collect();
                let val_x = train.features.select(Axis(0), val);
                let val_tags: Vec<Vec<bool>> = val
                    .iter()
                    .map(|&i| y.row(i).iter().map(|&v| v > 0.5).collect())
                    .collect();
                let mut score = |m: &JointModel| match m.fill_in_tags(val_x.view()) {
                    Ok(s) => mean_lrap(s.view(), &val_tags) as f32,
                    Err(_) => f32::NAN,
                };
                let (model, summary) = JointModel::fit(
                    train.features.select(Axis(0), &fit).view(),
                    y.select(Axis(0), &fit).view(),
                    Some(&mut score),
                    &options,
                    &mut |_| {},
                )
                .map_err(fail)?;
                let weight = if self.blend {
                    let knn = knn_on(train, &fit)?;
                    let readout = model.fill_in_tags(val_x.view()).map_err(fail)?;
                    let near = knn.score(val_x.view())?;
                    let lraps: Vec<f64> = BLEND_WEIGHTS
                        .iter()
                        .map(|&w| {
                            mean_lrap(blend(readout.clone(), near.clone(), w).view(), &val_tags)
                        })
                        .collect();
                    let best =
                        (0..lraps.len()).fold(0, |b, i| if lraps[i] > lraps[b] { i } else { b });
                    Some(BLEND_WEIGHTS[best])
                } else {
                    None
                };
                (summary.kept_epoch + 1, weight)
            }
            // Too few content groups to hold one out: full length, an even blend.
            None => (options.max_epochs, self.blend.then_some(0.5)),
        };
        let all = JointOptions {
            max_epochs: epochs,
            ..options
        };
        let (model, _) =
            JointModel::fit(train.features, y.view(), None, &all, &mut |_| {}).map_err(fail)?;
        let knn = match weight {
            Some(w) => Some((w, knn_on(train, &all_rows)?)),
            None => None,
        };
        self.fitted = Some(Fitted { model, epochs, knn });
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        let fitted = self
            .fitted
            .as_ref()
            .ok_or_else(|| EvalError::NotFitted(self.name().into()))?;
        let fail = |e| model_error(self.name(), e);
        let readout = fitted.model.fill_in_tags(features).map_err(fail)?;
        match &fitted.knn {
            Some((w, knn)) => {
                let near = knn.score(features)?;
                Ok(blend(readout, near, *w))
            }
            None => Ok(readout),
        }
    }

    fn settings(&self) -> Option<String> {
        let f = self.fitted.as_ref()?;
        let m = &f.model;
        let sizes = format!(
            "h={}/{}/{} epochs={}",
            m.image.n_hidden(),
            m.tags.n_hidden(),
            m.shared.n_hidden(),
            f.epochs
        );
        Some(match &f.knn {
            Some((w, knn)) => format!("{sizes} w={w} {}", knn.settings().unwrap_or_default()),
            None => sizes,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::baselines::tests::synthetic;
    use crate::PriorScorer;

    fn lrap(method: &mut dyn TagScorer) -> f64 {
        let (x, tags) = synthetic(240, 10, 0.6, 3);
        let groups: Vec<usize> = (0..180).collect();
        let train = TrainSet {
            features: x.slice(ndarray::s![..180, ..]),
            tags: &tags[..180],
            n_tags: 10,
            groups: &groups,
            seed: 3,
        };
        method.fit(&train).unwrap();
        let scores = method.score(x.slice(ndarray::s![180.., ..])).unwrap();
        assert_eq!(scores.dim(), (60, 10));
        let relevant: Vec<Vec<bool>> = tags[180..]
            .iter()
            .map(|t| (0..10).map(|j| t.contains(&j)).collect())
            .collect();
        mean_lrap(scores.view(), &relevant)
    }

    // Same synthetic task as the baselines' test, where kNN and ridge exceed 0.85.
    // Measured: joint 0.896 (prior 0.297); the blend chose weight 1 here, so the same.
    #[test]
    fn joint_learns_informative_features_and_is_deterministic() {
        let mut joint = JointScorer::default();
        let got = lrap(&mut joint);
        let prior = lrap(&mut PriorScorer::default());
        assert!(
            got > 0.85 && got > prior + 0.25,
            "joint {got}, prior {prior}"
        );
        assert!(joint.settings().unwrap().starts_with("h="));
        assert_eq!(got, lrap(&mut JointScorer::default()));
        let mut blended = JointScorer::default().blended_with_knn();
        assert_eq!(blended.name(), "joint+knn");
        let with_knn = lrap(&mut blended);
        assert!(with_knn > 0.85, "joint+knn {with_knn}");
        assert!(blended.settings().unwrap().contains(" w="));
    }

    // By hand: rows scaled to their maximum, [2, 1, 0] → [1, 0.5, 0] and [0, 4, 4] →
    // [0, 1, 1]; weight 0.25 on the first: [0.25, 0.875, 0.75].
    #[test]
    fn blend_scales_each_source_by_its_row_maximum() {
        let b = blend(
            ndarray::array![[2.0f32, 1.0, 0.0]],
            ndarray::array![[0.0f32, 4.0, 4.0]],
            0.25,
        );
        let want = [0.25f32, 0.875, 0.75];
        assert!(b.iter().zip(want).all(|(g, w)| (g - w).abs() < 1e-6), "{b}");
        // an all-zero row stays zero instead of dividing by zero
        assert_eq!(
            row_max_scaled(Array2::zeros((1, 3))),
            Array2::<f32>::zeros((1, 3))
        );
    }

    #[test]
    fn refuses_to_score_before_fit() {
        assert!(matches!(
            JointScorer::default().score(Array2::zeros((1, 2)).view()),
            Err(EvalError::NotFitted(_))
        ));
    }
}
