//! tagweave's own tag suggester, measured like the baselines and trained the same way
//! as for the product.

use ndarray::{Array2, ArrayView2};
use tagweave_model::JointOptions;
use tagweave_suggest::{KnnScorer, SuggestError, TagSuggester, TrainSet};

use crate::{EvalError, TagScorer};

/// [`TagSuggester`] as an evaluated method.
#[derive(Debug, Clone, Default)]
pub struct JointScorer {
    options: JointOptions,
    fitted: Option<(TagSuggester, KnnScorer)>,
}

impl JointScorer {
    pub fn with_options(options: JointOptions) -> Self {
        Self {
            options,
            fitted: None,
        }
    }

    fn fitted(&self) -> Result<&(TagSuggester, KnnScorer), EvalError> {
        Ok(self
            .fitted
            .as_ref()
            .ok_or_else(|| SuggestError::NotFitted("joint".into()))?)
    }
}

impl TagScorer for JointScorer {
    fn name(&self) -> &str {
        "joint"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        self.fitted = Some(TagSuggester::train(train, &self.options, &mut |_, _| {})?);
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        let (suggester, knn) = self.fitted()?;
        Ok(suggester.suggest(features, knn, &[])?)
    }

    fn score_given(
        &self,
        features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        let (suggester, knn) = self.fitted()?;
        Ok(suggester.suggest_given(features, revealed, knn, &[])?)
    }

    fn completion_parts(
        &self,
        features: ArrayView2<f32>,
        revealed: &[Vec<usize>],
    ) -> Result<Vec<(String, Array2<f32>)>, EvalError> {
        let (suggester, _) = self.fitted()?;
        Ok(vec![(
            "joint model alone".into(),
            suggester.network_given(features, revealed)?,
        )])
    }

    fn settings(&self) -> Option<String> {
        self.fitted.as_ref().map(|(s, _)| s.describe())
    }

    fn calibrated(&self) -> bool {
        self.fitted
            .as_ref()
            .is_some_and(|(s, _)| s.calibration.is_some())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::baselines::tests::synthetic;
    use crate::metrics::{label_ranking_average_precision, mean};
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
            variants: &[],
        };
        method.fit(&train).unwrap();
        let scores = method.score(x.slice(ndarray::s![180.., ..])).unwrap();
        assert_eq!(scores.dim(), (60, 10));
        mean(scores.outer_iter().zip(&tags[180..]).map(|(row, t)| {
            let relevant: Vec<bool> = (0..10).map(|j| t.contains(&j)).collect();
            label_ranking_average_precision(&row.to_vec(), &relevant)
        }))
        .unwrap()
    }

    // Same synthetic task as the baselines' test, where kNN and ridge exceed 0.85.
    #[test]
    fn joint_learns_informative_features_and_is_deterministic() {
        let mut joint = JointScorer::default();
        let got = lrap(&mut joint);
        let prior = lrap(&mut PriorScorer::default());
        assert!(
            got > 0.85 && got > prior + 0.25,
            "joint {got}, prior {prior}"
        );
        let settings = joint.settings().unwrap();
        assert!(
            settings.starts_with("h=") && settings.contains(" w="),
            "{settings}"
        );
        assert!(joint.calibrated());
        assert_eq!(got, lrap(&mut JointScorer::default()));
    }

    #[test]
    fn refuses_to_score_before_fit() {
        assert!(matches!(
            JointScorer::default().score(Array2::zeros((1, 2)).view()),
            Err(EvalError::Suggest(SuggestError::NotFitted(_)))
        ));
    }
}
