//! A whole experiment on one tagged collection: every method measured on the same split
//! and, when the pictures known to carry a wrong tag are listed, an out-of-fold audit
//! scored against them.

use ndarray::ArrayView2;
use tagweave_model::JointOptions;

use crate::{
    audit_out_of_fold, baselines, completion_baselines, evaluate_with_variants, EvalError,
    EvalOptions, JointScorer, Progress, Report, TagScorer,
};

/// Folds of the out-of-fold audit behind the known-mislabel measurement.
pub const AUDIT_FOLDS: usize = 5;
/// Keeps the audit's folds independent of the split drawn from the same seed.
const AUDIT_SEED: u64 = 0x6175_6469;

/// A tagged collection as an experiment measures it, one row per picture.
#[derive(Debug, Clone, Copy)]
pub struct Collection<'a> {
    /// Raw feature rows (not standardised).
    pub features: ArrayView2<'a, f32>,
    /// Variants of every picture, raw like `features` (`variants[v]` row `i`: variant `v`
    /// of row `i`); only the train pictures' reach the joint model. Empty = none.
    pub variants: &'a [ArrayView2<'a, f32>],
    /// Tags of each picture, normalised.
    pub tags: &'a [Vec<String>],
    /// Content key of each picture (pictures with equal keys are the same picture).
    pub content_keys: &'a [String],
    /// `known_mislabels[i]`: picture `i` is known to carry a wrong tag. `None`: not
    /// measured (no audit).
    pub known_mislabels: Option<&'a [bool]>,
}

/// The baselines, the completion baselines and tagweave's joint model, in report order.
pub fn all_methods(joint: JointOptions) -> Vec<Box<dyn TagScorer>> {
    let mut all = baselines();
    all.extend(completion_baselines());
    all.push(Box::new(JointScorer::with_options(joint)));
    all
}

/// Measures the baselines and the joint model (with `joint`) on one split of
/// `collection` ([`evaluate_with_variants`]). With known mislabels, every tagged picture
/// is then judged by the baselines fitted on the other folds ([`audit_out_of_fold`],
/// [`AUDIT_FOLDS`] folds) and the report gets the audit's scores against them.
pub fn run_experiment(
    collection: &Collection,
    options: &EvalOptions,
    joint: &JointOptions,
    on_progress: &mut dyn FnMut(Progress),
) -> Result<Report, EvalError> {
    let mut methods = all_methods(joint.clone());
    let mut report = evaluate_with_variants(
        collection.features,
        collection.variants,
        collection.tags,
        collection.content_keys,
        options,
        &mut methods,
        on_progress,
    )?;
    if let Some(known) = collection.known_mislabels {
        let audit = audit_out_of_fold(
            collection.features,
            collection.tags,
            collection.content_keys,
            AUDIT_FOLDS,
            options.seed ^ AUDIT_SEED,
            // Baselines only: the joint methods made the demo's audit 36 s instead of a
            // few (5 folds × 2 fine-tunings each).
            &baselines,
            on_progress,
        )?;
        report.known_mislabels = Some(audit.against_known(known)?);
    }
    Ok(report)
}

#[cfg(test)]
mod tests {
    use ndarray::Array2;

    use super::*;
    use crate::baselines::tests::synthetic;

    /// A small collection: string tags, distinct content keys, every tenth picture
    /// given the tags of the next one (a known mislabel).
    fn collection(n: usize) -> (Array2<f32>, Vec<Vec<String>>, Vec<String>, Vec<bool>) {
        let (x, idx) = synthetic(n, 6, 0.3, 4);
        let mut tags: Vec<Vec<String>> = idx
            .iter()
            .map(|row| row.iter().map(|t| format!("tag-{t}")).collect())
            .collect();
        let mut known = vec![false; n];
        for i in (0..n - 1).step_by(10) {
            if tags[i] != tags[i + 1] {
                tags[i] = tags[i + 1].clone();
                known[i] = true;
            }
        }
        let keys = (0..n).map(|i| format!("hash-{i}")).collect();
        (x, tags, keys, known)
    }

    fn quick_joint() -> JointOptions {
        JointOptions {
            max_epochs: 2,
            pretrain_epochs: 1,
            ..JointOptions::default()
        }
    }

    // The experiment is the split measurement plus, with known mislabels, the audit: the
    // same numbers as the two parts run by hand.
    #[test]
    fn an_experiment_is_the_split_measurement_and_the_audit() {
        let (x, tags, keys, known) = collection(60);
        let options = EvalOptions {
            seed: 3,
            ..EvalOptions::default()
        };
        let without = Collection {
            features: x.view(),
            variants: &[],
            tags: &tags,
            content_keys: &keys,
            known_mislabels: None,
        };
        let mut events = Vec::new();
        let plain = run_experiment(&without, &options, &quick_joint(), &mut |e| {
            events.push(format!("{e:?}"))
        })
        .unwrap();
        assert!(plain.known_mislabels.is_none());
        let names: Vec<&String> = plain.methods.keys().collect();
        assert_eq!(names, ["joint", "knn", "prior", "ridge"]);
        assert!(
            !events.iter().any(|e| e.starts_with("Auditing")),
            "{events:?}"
        );
        let by_hand = evaluate_with_variants(
            x.view(),
            &[],
            &tags,
            &keys,
            &options,
            &mut all_methods(quick_joint()),
            &mut |_| {},
        )
        .unwrap();
        assert_eq!(plain.without_timings(), by_hand.without_timings());

        let with = Collection {
            known_mislabels: Some(&known),
            ..without
        };
        let mut folds = 0;
        let audited = run_experiment(&with, &options, &quick_joint(), &mut |e| {
            folds += usize::from(matches!(e, Progress::Auditing { .. }))
        })
        .unwrap();
        assert_eq!(folds, AUDIT_FOLDS);
        let measured = audited.known_mislabels.unwrap();
        let audit = audit_out_of_fold(
            x.view(),
            &tags,
            &keys,
            AUDIT_FOLDS,
            3 ^ AUDIT_SEED,
            &baselines,
            &mut |_| {},
        )
        .unwrap();
        assert_eq!(measured, audit.against_known(&known).unwrap());
        assert_eq!(measured.known, known.iter().filter(|&&k| k).count());
        let audited_methods: Vec<&String> = measured.methods.keys().collect();
        assert_eq!(audited_methods, ["knn", "prior", "ridge"]);
    }
}
