//! Out-of-fold audit: every tagged picture disputed by methods that never saw
//! its tags, so real mislabels (not only injected ones) can be measured
//! against a list of pictures known to carry a wrong tag.

use std::collections::BTreeMap;

use ndarray::{ArrayView2, Axis};
use serde::Serialize;

use tagweave_suggest::{group_ids, grouped_folds, Standardiser, TagColumns, TrainSet};

use crate::metrics::{precision_at_count, roc_auc};
use crate::runner::{check_collection, check_method_names, check_scores};
use crate::{disagreement, EvalError, Progress, TagScorer};

/// Dispute scores of one audit, one entry per feature row.
#[derive(Debug, Clone, PartialEq)]
pub struct Audit {
    /// Folds actually used (fewer than asked when there are fewer content groups).
    pub folds: usize,
    /// Per method: [`disagreement`] of each picture, `None` for pictures
    /// without tags or whose tags all occur in their own fold only.
    pub disputes: BTreeMap<String, Vec<Option<f64>>>,
}

/// Splits the tagged pictures into `folds` folds (content groups kept
/// whole, seeded) and, for each fold, gives fresh methods from
/// `make_methods` the other folds only — their tags, a vocabulary built from
/// them, features standardised with their statistics — then scores the
/// fold's pictures and rates how much each method disputes their tags.
/// Disputes are ranked within each fold's score matrix; see [`disagreement`]
/// for why pooling the folds is fair.
pub fn audit_out_of_fold(
    features: ArrayView2<f32>,
    tags: &[Vec<String>],
    content_keys: &[String],
    folds: usize,
    seed: u64,
    make_methods: &dyn Fn() -> Vec<Box<dyn TagScorer>>,
    on_progress: &mut dyn FnMut(Progress),
) -> Result<Audit, EvalError> {
    check_collection(features, tags, content_keys)?;
    if folds < 2 {
        return Err(EvalError::BadFolds(folds));
    }
    let tagged: Vec<usize> = (0..tags.len()).filter(|&i| !tags[i].is_empty()).collect();
    let all_groups = group_ids(content_keys);
    let tagged_groups: Vec<usize> = tagged.iter().map(|&i| all_groups[i]).collect();
    let fold_lists = grouped_folds(&tagged_groups, folds, seed);
    if fold_lists.is_empty() {
        let mut distinct = tagged_groups.clone();
        distinct.sort_unstable();
        distinct.dedup();
        return Err(EvalError::TooFewItems {
            items: tagged.len(),
            groups: distinct.len(),
        });
    }

    let mut disputes: BTreeMap<String, Vec<Option<f64>>> = BTreeMap::new();
    for (fold, held) in fold_lists.iter().enumerate() {
        on_progress(Progress::Auditing {
            fold,
            folds: fold_lists.len(),
        });
        let mut in_fold = vec![false; tagged.len()];
        held.iter().for_each(|&p| in_fold[p] = true);
        let train_pos: Vec<usize> = (0..tagged.len()).filter(|&p| !in_fold[p]).collect();
        let train_rows: Vec<usize> = train_pos.iter().map(|&p| tagged[p]).collect();
        let columns = TagColumns::from_items(train_rows.iter().map(|&i| tags[i].as_slice()));
        let train_tags: Vec<Vec<usize>> = train_rows
            .iter()
            .map(|&i| columns.encode(&tags[i]))
            .collect();
        let (judged_rows, judged_tags): (Vec<usize>, Vec<Vec<usize>>) = held
            .iter()
            .map(|&p| (tagged[p], columns.encode(&tags[tagged[p]])))
            .filter(|(_, t)| !t.is_empty())
            .unzip();
        let standardiser = Standardiser::fit(features.select(Axis(0), &train_rows).view());
        let train_x = standardiser.apply(features.select(Axis(0), &train_rows).view());
        let judged_x = standardiser.apply(features.select(Axis(0), &judged_rows).view());
        let train_groups: Vec<usize> = train_pos.iter().map(|&p| tagged_groups[p]).collect();
        let train_set = TrainSet {
            features: train_x.view(),
            tags: &train_tags,
            n_tags: columns.len(),
            groups: &train_groups,
            seed,
            variants: &[],
        };
        let mut methods = make_methods();
        check_method_names(&methods)?;
        for method in methods.iter_mut() {
            let row = disputes
                .entry(method.name().to_string())
                .or_insert_with(|| vec![None; tags.len()]);
            if judged_rows.is_empty() {
                continue;
            }
            method.fit(&train_set)?;
            let scores = method.score(judged_x.view())?;
            check_scores(method.name(), &scores, judged_rows.len(), columns.len())?;
            for (&i, d) in judged_rows
                .iter()
                .zip(disagreement(scores.view(), &judged_tags))
            {
                row[i] = Some(d);
            }
        }
    }
    Ok(Audit {
        folds: fold_lists.len(),
        disputes,
    })
}

/// How well one method's out-of-fold disputes find the known mislabels.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KnownMislabelScore {
    /// ROC AUC of the dispute against "known to carry a wrong tag"; absent
    /// unless both known and other pictures were judged.
    pub auc: Option<f64>,
    /// Share of known mislabels among the `known` most disputed pictures.
    pub precision: Option<f64>,
}

/// Real mislabels found by the audit, over the pictures it could judge.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct KnownMislabels {
    pub folds: usize,
    /// Tagged pictures that received a dispute score.
    pub pictures: usize,
    /// Of those, pictures known to carry a wrong tag.
    pub known: usize,
    pub methods: BTreeMap<String, KnownMislabelScore>,
}

impl Audit {
    /// Scores the disputes against `known[i]` = "feature row i is known to
    /// carry a wrong tag"; pictures without a dispute score are left out.
    pub fn against_known(&self, known: &[bool]) -> Result<KnownMislabels, EvalError> {
        let mut methods = BTreeMap::new();
        let (mut pictures, mut n_known) = (0, 0);
        for (name, disputes) in &self.disputes {
            if known.len() != disputes.len() {
                return Err(EvalError::LengthMismatch {
                    what: "known-mislabel list",
                    got: known.len(),
                    expected: disputes.len(),
                });
            }
            let (scores, positive): (Vec<f64>, Vec<bool>) = disputes
                .iter()
                .zip(known)
                .filter_map(|(d, &k)| d.map(|d| (d, k)))
                .unzip();
            pictures = scores.len();
            n_known = positive.iter().filter(|&&k| k).count();
            methods.insert(
                name.clone(),
                KnownMislabelScore {
                    auc: roc_auc(&scores, &positive),
                    precision: precision_at_count(&scores, &positive, n_known),
                },
            );
        }
        Ok(KnownMislabels {
            folds: self.folds,
            pictures,
            known: n_known,
            methods,
        })
    }
}

#[cfg(test)]
mod tests {
    use std::cell::RefCell;
    use std::rc::Rc;

    use ndarray::Array2;

    use super::*;
    use crate::baselines::tests::synthetic;
    use crate::{baselines, PriorScorer};
    use tagweave_suggest::KnnScorer;

    fn names(tags: &[Vec<usize>]) -> Vec<Vec<String>> {
        tags.iter()
            .map(|row| row.iter().map(|t| format!("tag-{t}")).collect())
            .collect()
    }

    fn distinct_keys(n: usize) -> Vec<String> {
        (0..n).map(|i| format!("hash-{i}")).collect()
    }

    #[test]
    fn planted_wrong_tag_sets_are_disputed_most() {
        // every 20th picture gets the tags of the next picture whose set shares none of its own
        let (x, clean) = synthetic(200, 10, 0.4, 21);
        let mut planted = clean.clone();
        let mut known = vec![false; 200];
        for i in (5..200).step_by(20) {
            let donor = (i + 1..200)
                .find(|&j| clean[j].iter().all(|t| !clean[i].contains(t)))
                .unwrap();
            planted[i] = clean[donor].clone();
            known[i] = true;
        }
        let mut tags = names(&planted);
        tags[0].clear(); // an untagged picture is not judged
        let audit = audit_out_of_fold(
            x.view(),
            &tags,
            &distinct_keys(200),
            5,
            3,
            &baselines,
            &mut |_| {},
        )
        .unwrap();
        assert_eq!(audit.folds, 5);
        let result = audit.against_known(&known).unwrap();
        assert_eq!((result.pictures, result.known), (199, 10));
        for method in ["knn", "ridge"] {
            assert_eq!(audit.disputes[method][0], None);
            let score = &result.methods[method];
            assert!(score.auc.unwrap() > 0.95, "{method}: {score:?}");
            assert!(score.precision.unwrap() >= 0.8, "{method}: {score:?}");
            // every planted set is disputed more than most clean pictures
            let d = &audit.disputes[method];
            let mut clean_d: Vec<f64> = (1..200)
                .filter(|&i| !known[i])
                .map(|i| d[i].unwrap())
                .collect();
            clean_d.sort_by(f64::total_cmp);
            let clean_p75 = clean_d[clean_d.len() * 3 / 4];
            for i in (5..200).step_by(20) {
                assert!(
                    d[i].unwrap() > clean_p75,
                    "{method} {i}: {:?} vs {clean_p75}",
                    d[i]
                );
            }
        }
        // blind to the picture: every picture is disputed by exactly ½
        assert!(audit.disputes["prior"][1..].iter().all(|&d| d == Some(0.5)));
        assert_eq!(result.methods["prior"].auc, Some(0.5));
        // all tied: the top 10 hold 10 · 10/199 known mislabels on average
        let prior_precision = result.methods["prior"].precision.unwrap();
        assert!((prior_precision - 10.0 / 199.0).abs() < 1e-12);
    }

    #[test]
    fn known_mislabel_scores_worked_example() {
        // worked by hand: judged pictures 0, 1, 3, 4 with disputes 0.9 (known),
        // 0.2, 0.5 (known), 0.5; picture 2 was not judged.
        // AUC: pairs (0.9>0.2) 1, (0.9>0.5) 1, (0.5>0.2) 1, (0.5=0.5) ½ → 3.5/4.
        // Precision at 2: 0.9 is in; one of the two tied 0.5s → expected 1.5 hits / 2.
        let audit = Audit {
            folds: 2,
            disputes: BTreeMap::from([(
                "m".to_string(),
                vec![Some(0.9), Some(0.2), None, Some(0.5), Some(0.5)],
            )]),
        };
        let r = audit
            .against_known(&[true, false, true, true, false])
            .unwrap();
        assert_eq!((r.pictures, r.known, r.folds), (4, 2, 2));
        assert_eq!(r.methods["m"].auc, Some(0.875));
        assert_eq!(r.methods["m"].precision, Some(0.75));
        assert!(matches!(
            audit.against_known(&[true]),
            Err(EvalError::LengthMismatch { got: 1, .. })
        ));
        let none_known = audit.against_known(&[false; 5]).unwrap();
        assert_eq!(none_known.methods["m"].auc, None);
        assert_eq!(none_known.methods["m"].precision, None);
    }

    /// What a method was handed: per fold, the train features and vocabulary
    /// size it was fitted with, and the features it was asked to score.
    #[derive(Default)]
    struct Seen {
        fits: Vec<(Array2<f32>, usize)>,
        scored: Vec<Array2<f32>>,
    }

    struct Recorder {
        seen: Rc<RefCell<Seen>>,
        n_tags: usize,
    }

    impl TagScorer for Recorder {
        fn name(&self) -> &str {
            "recorder"
        }
        fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
            self.seen
                .borrow_mut()
                .fits
                .push((train.features.to_owned(), train.n_tags));
            self.n_tags = train.n_tags;
            Ok(())
        }
        fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
            self.seen.borrow_mut().scored.push(features.to_owned());
            Ok(Array2::zeros((features.nrows(), self.n_tags)))
        }
    }

    #[test]
    fn no_picture_is_judged_by_a_method_that_saw_it_or_its_duplicate() {
        // 40 pictures; 0–19 come in duplicate pairs (same key, same features);
        // 39 is untagged. Each tagged picture carries its parity and a tag of its own.
        let n = 40;
        let group = |i: usize| if i < 20 { i / 2 } else { i };
        let keys: Vec<String> = (0..n).map(|i| format!("hash-{}", group(i))).collect();
        let x = Array2::from_shape_fn((n, 3), |(i, j)| {
            let g = group(i) as f32;
            [g, (g * g) % 17.0, (g * 7.0) % 5.0][j]
        });
        let mut tags: Vec<Vec<String>> = (0..n)
            .map(|i| vec![format!("parity-{}", i % 2), format!("own-{i}")])
            .collect();
        tags[n - 1].clear();
        let seen = Rc::new(RefCell::new(Seen::default()));
        let make = || -> Vec<Box<dyn TagScorer>> {
            vec![Box::new(Recorder {
                seen: seen.clone(),
                n_tags: 0,
            })]
        };
        let audit = audit_out_of_fold(x.view(), &tags, &keys, 5, 11, &make, &mut |_| {}).unwrap();
        let d = &audit.disputes["recorder"];
        assert!(d[..n - 1].iter().all(Option::is_some) && d[n - 1].is_none());

        let seen = seen.borrow();
        assert_eq!((seen.fits.len(), seen.scored.len()), (5, 5));
        let scored_total: usize = seen.scored.iter().map(|s| s.nrows()).sum();
        assert_eq!(
            scored_total,
            n - 1,
            "every tagged picture judged exactly once"
        );
        for ((train, n_tags), judged) in seen.fits.iter().zip(&seen.scored) {
            assert_eq!(train.nrows() + judged.nrows(), n - 1);
            // vocabulary from the other folds only: both parities + one own tag per train picture
            assert_eq!(*n_tags, train.nrows() + 2);
            // standardised with the train rows' own statistics
            for col in train.columns() {
                assert!(col.mean().unwrap().abs() < 1e-4, "{col}");
            }
            // the same transform maps equal raw rows to equal rows: no judged
            // picture (nor its duplicate) is among the train rows
            for row in judged.outer_iter() {
                assert!(train.outer_iter().all(|t| t != row), "leak: {row}");
            }
        }
    }

    #[test]
    fn audit_is_seeded_and_refuses_bad_input() {
        let (x, clean) = synthetic(60, 6, 0.4, 2);
        let tags = names(&clean);
        let keys = distinct_keys(60);
        let knn = || -> Vec<Box<dyn TagScorer>> { vec![Box::new(KnnScorer::default())] };
        let run = |seed| audit_out_of_fold(x.view(), &tags, &keys, 4, seed, &knn, &mut |_| {});
        let mut progress = 0;
        let a = audit_out_of_fold(x.view(), &tags, &keys, 4, 1, &knn, &mut |_| progress += 1);
        assert_eq!(progress, 4);
        let a = a.unwrap();
        assert_eq!(a, run(1).unwrap());
        assert_ne!(a, run(2).unwrap());
        assert!(matches!(run(1).map(|a| a.folds), Ok(4)));
        assert!(matches!(
            audit_out_of_fold(x.view(), &tags, &keys, 1, 1, &knn, &mut |_| {}),
            Err(EvalError::BadFolds(1))
        ));
        let one_group = vec!["same".to_string(); 60];
        assert!(matches!(
            audit_out_of_fold(x.view(), &tags, &one_group, 5, 1, &knn, &mut |_| {}),
            Err(EvalError::TooFewItems { groups: 1, .. })
        ));
        assert!(matches!(
            audit_out_of_fold(x.view(), &tags[..10], &keys, 5, 1, &knn, &mut |_| {}),
            Err(EvalError::LengthMismatch { got: 10, .. })
        ));
        let twice = || -> Vec<Box<dyn TagScorer>> {
            vec![
                Box::new(PriorScorer::default()),
                Box::new(PriorScorer::default()),
            ]
        };
        assert!(matches!(
            audit_out_of_fold(x.view(), &tags, &keys, 5, 1, &twice, &mut |_| {}),
            Err(EvalError::DuplicateMethod(_))
        ));
    }
}
