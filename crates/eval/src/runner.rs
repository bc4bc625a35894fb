//! One evaluation run: split, vocabulary, standardisation, every method
//! fitted on train pictures only and measured on the same held-out pictures.

use std::collections::{BTreeMap, BTreeSet};
use std::time::Instant;

use ndarray::{Array2, ArrayView2, Axis};

use tagweave_suggest::{group_ids, KnnScorer, Standardiser, TagColumns, TrainSet};

use crate::metrics::{
    annotation_scores, coverage_error, label_ranking_average_precision, mean, pair_search_map,
    precision_at_count, precision_at_k, recall_at_k, roc_auc, select_pairs, tag_search_map,
    MIN_SEARCH_POSITIVES,
};

use crate::{
    inject_mislabels, measure_completion, split, Completion, CompletionSplit, CooccurrenceScorer,
    EvalError, Injection, MethodReport, PriorScorer, Reliability, Report, RidgeCooccurrenceBlend,
    RidgeScorer, SplitSummary, TagScorer,
};
use tagweave_suggest::reveal_half;

/// Keeps the completion protocol's reveal independent of the split from the same seed.
const REVEAL_SEED: u64 = 0x7265_7665;

/// The baselines that read revealed tags, measured on tag completion only: tag
/// co-occurrence and its validated blend with ridge.
pub fn completion_baselines() -> Vec<Box<dyn TagScorer>> {
    vec![
        Box::new(CooccurrenceScorer::default()),
        Box::new(RidgeCooccurrenceBlend::default()),
    ]
}

/// Tags suggested per picture for P@5, R@5 and per-tag annotation.
pub const SUGGESTIONS: usize = 5;

/// Equal-width probability bins of the reliability table.
const RELIABILITY_BINS: usize = 10;

/// Offsets deriving independent streams from the one user seed.
const PAIR_SEED: u64 = 0x7061_6972;
const NOISE_SEED: u64 = 0x6e6f_6973;

/// Knobs of a run; `Default` gives the house settings (75/25, 5 % swapped, 200 pairs).
#[derive(Debug, Clone, PartialEq)]
pub struct EvalOptions {
    pub seed: u64,
    pub train_fraction: f64,
    /// Share of measured test pictures given another picture's tags.
    pub noise_fraction: f64,
    /// Most two-tag queries to sample.
    pub max_pairs: usize,
}

impl Default for EvalOptions {
    fn default() -> Self {
        EvalOptions {
            seed: 1,
            train_fraction: 0.75,
            noise_fraction: 0.05,
            max_pairs: 200,
        }
    }
}

/// Reported before each method is fitted and before it is measured, and
/// before each fold of an audit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Progress<'a> {
    Fitting {
        method: &'a str,
        index: usize,
        total: usize,
    },
    Measuring {
        method: &'a str,
        index: usize,
        total: usize,
    },
    /// Before the methods are fitted on all folds but `fold` of an out-of-fold audit.
    Auditing { fold: usize, folds: usize },
}

/// The three baselines, in report order: tag frequency, kNN, ridge.
pub fn baselines() -> Vec<Box<dyn TagScorer>> {
    vec![
        Box::new(PriorScorer::default()),
        Box::new(KnnScorer::default()),
        Box::new(RidgeScorer::default()),
    ]
}

/// The checks every entry point makes on the collection it is handed.
pub(crate) fn check_collection(
    features: ArrayView2<f32>,
    tags: &[Vec<String>],
    content_keys: &[String],
) -> Result<(), EvalError> {
    for (what, got) in [
        ("tag list", tags.len()),
        ("content key list", content_keys.len()),
    ] {
        if got != features.nrows() {
            return Err(EvalError::LengthMismatch {
                what,
                got,
                expected: features.nrows(),
            });
        }
    }
    if features.ncols() == 0 {
        return Err(EvalError::NoFeatures);
    }
    if let Some(((row, col), _)) = features.indexed_iter().find(|(_, v)| !v.is_finite()) {
        return Err(EvalError::NonFiniteFeature { row, col });
    }
    Ok(())
}

/// Method names must be distinct: they key the report.
pub(crate) fn check_method_names(methods: &[Box<dyn TagScorer>]) -> Result<(), EvalError> {
    let mut names = BTreeSet::new();
    for m in methods {
        if !names.insert(m.name()) {
            return Err(EvalError::DuplicateMethod(m.name().to_string()));
        }
    }
    Ok(())
}

fn check_inputs(
    features: ArrayView2<f32>,
    tags: &[Vec<String>],
    content_keys: &[String],
    options: &EvalOptions,
    methods: &[Box<dyn TagScorer>],
) -> Result<(), EvalError> {
    check_collection(features, tags, content_keys)?;
    check_method_names(methods)?;
    if !(0.0..=0.5).contains(&options.noise_fraction) {
        return Err(EvalError::BadNoiseFraction(options.noise_fraction));
    }
    Ok(())
}

/// Every variant matrix must match the features in shape and hold finite values.
fn check_variants(
    features: ArrayView2<f32>,
    variants: &[ArrayView2<f32>],
) -> Result<(), EvalError> {
    for variant in variants {
        if variant.nrows() != features.nrows() {
            return Err(EvalError::LengthMismatch {
                what: "a variant matrix",
                got: variant.nrows(),
                expected: features.nrows(),
            });
        }
        if variant.ncols() != features.ncols() {
            return Err(EvalError::VariantWidth {
                got: variant.ncols(),
                expected: features.ncols(),
            });
        }
        if let Some(((row, col), _)) = variant.indexed_iter().find(|(_, v)| !v.is_finite()) {
            return Err(EvalError::NonFiniteFeature { row, col });
        }
    }
    Ok(())
}

/// What every method is measured against: the held-out truth, prepared once.
struct TestTruth {
    lists: Vec<Vec<usize>>,
    matrix: Array2<bool>,
    pairs: Vec<(usize, usize)>,
    injection: Injection,
}

pub(crate) fn check_scores(
    name: &str,
    scores: &Array2<f32>,
    rows: usize,
    cols: usize,
) -> Result<(), EvalError> {
    if scores.dim() != (rows, cols) {
        return Err(EvalError::BadScoreShape {
            method: name.to_string(),
            got_rows: scores.nrows(),
            got_cols: scores.ncols(),
            rows,
            cols,
        });
    }
    match scores.indexed_iter().find(|(_, v)| !v.is_finite()) {
        Some(((row, col), _)) => Err(EvalError::NonFiniteScore {
            method: name.to_string(),
            row,
            col,
        }),
        None => Ok(()),
    }
}

fn measure(scores: ArrayView2<f32>, truth: &TestTruth) -> Result<MethodReport, EvalError> {
    let rows: Vec<(Vec<f32>, Vec<bool>)> = scores
        .outer_iter()
        .zip(truth.matrix.outer_iter())
        .map(|(s, t)| (s.to_vec(), t.to_vec()))
        .collect();
    let per_picture = |f: &dyn Fn(&[f32], &[bool]) -> f64| {
        mean(rows.iter().map(|(s, t)| f(s, t))).ok_or(EvalError::NothingToMeasure)
    };
    let annotation = annotation_scores(scores, truth.matrix.view(), SUGGESTIONS)
        .ok_or(EvalError::NothingToMeasure)?;
    let disputed = crate::disagreement(scores, &truth.injection.tags);
    let noisy = &truth.injection.noisy;
    let n_noisy = noisy.iter().filter(|&&x| x).count();
    Ok(MethodReport {
        settings: None,
        lrap: per_picture(&|s, t| label_ranking_average_precision(s, t))?,
        p_at_1: per_picture(&|s, t| precision_at_k(s, t, 1))?,
        p_at_5: per_picture(&|s, t| precision_at_k(s, t, SUGGESTIONS))?,
        r_at_5: per_picture(&|s, t| recall_at_k(s, t, SUGGESTIONS))?,
        coverage: per_picture(&|s, t| coverage_error(s, t))?,
        tag_precision: annotation.precision,
        tag_recall: annotation.recall,
        n_plus: annotation.n_plus,
        search_map: tag_search_map(scores, truth.matrix.view()).map(|s| s.map),
        search_map_pairs: pair_search_map(scores, truth.matrix.view(), &truth.pairs).map(|s| s.map),
        mislabel_auc: roc_auc(&disputed, noisy),
        mislabel_precision: precision_at_count(&disputed, noisy, n_noisy),
        seconds: 0.0,
        reliability: None,
    })
}

/// Splits the pictures (grouped by content key, seeded), builds the
/// vocabulary and the feature standardisation from train pictures only, and
/// for each method: `fit` on the train pictures (features + tags), `score`
/// the test pictures from their features alone, and measure.
///
/// `tags[i]` and `content_keys[i]` belong to feature row `i`; tags should
/// already be normalised. Test pictures left with no train-known tag are
/// counted and excluded from every metric.
pub fn evaluate(
    features: ArrayView2<f32>,
    tags: &[Vec<String>],
    content_keys: &[String],
    options: &EvalOptions,
    methods: &mut [Box<dyn TagScorer>],
    on_progress: &mut dyn FnMut(Progress),
) -> Result<Report, EvalError> {
    evaluate_with_variants(
        features,
        &[],
        tags,
        content_keys,
        options,
        methods,
        on_progress,
    )
}

/// [`evaluate`] with variants of every picture (`variants[v]` row `i`: variant `v` of feature
/// row `i`, raw like `features`). The train pictures' variants, standardised with the
/// features' standardiser, reach the methods as [`TrainSet::variants`]; test pictures are
/// scored on their originals only.
pub fn evaluate_with_variants(
    features: ArrayView2<f32>,
    variants: &[ArrayView2<f32>],
    tags: &[Vec<String>],
    content_keys: &[String],
    options: &EvalOptions,
    methods: &mut [Box<dyn TagScorer>],
    on_progress: &mut dyn FnMut(Progress),
) -> Result<Report, EvalError> {
    check_inputs(features, tags, content_keys, options, methods)?;
    check_variants(features, variants)?;
    let parts = split(
        features.nrows(),
        content_keys,
        options.train_fraction,
        options.seed,
    )?;
    let columns = TagColumns::from_items(parts.train.iter().map(|&i| tags[i].as_slice()));
    if columns.is_empty() {
        return Err(EvalError::EmptyVocabulary);
    }
    let encoded = |items: &[usize]| -> (Vec<usize>, Vec<Vec<usize>>) {
        items
            .iter()
            .map(|&i| (i, columns.encode(&tags[i])))
            .filter(|(_, t)| !t.is_empty())
            .unzip()
    };
    let (train_rows, train_tags) = encoded(&parts.train);
    let (test_rows, test_lists) = encoded(&parts.test);
    if test_rows.is_empty() {
        return Err(EvalError::NothingToMeasure);
    }
    let unseen: BTreeSet<&String> = parts
        .test
        .iter()
        .flat_map(|&i| &tags[i])
        .filter(|t| columns.index_of(t).is_none())
        .collect();

    let standardiser = Standardiser::fit(features.select(Axis(0), &train_rows).view());
    let train_x = standardiser.apply(features.select(Axis(0), &train_rows).view());
    let test_x = standardiser.apply(features.select(Axis(0), &test_rows).view());
    let train_variants: Vec<Array2<f32>> = variants
        .iter()
        .map(|v| standardiser.apply(v.select(Axis(0), &train_rows).view()))
        .collect();
    let all_groups = group_ids(content_keys);
    let train_groups: Vec<usize> = train_rows.iter().map(|&i| all_groups[i]).collect();

    let n_tags = columns.len();
    let mut matrix = Array2::from_elem((test_rows.len(), n_tags), false);
    for (i, list) in test_lists.iter().enumerate() {
        list.iter().for_each(|&t| matrix[[i, t]] = true);
    }
    let truth = TestTruth {
        pairs: select_pairs(matrix.view(), options.max_pairs, options.seed ^ PAIR_SEED),
        injection: inject_mislabels(
            &test_lists,
            options.noise_fraction,
            options.seed ^ NOISE_SEED,
        ),
        matrix,
        lists: test_lists,
    };
    let search_tags = truth
        .matrix
        .columns()
        .into_iter()
        .filter(|c| c.iter().filter(|&&x| x).count() >= MIN_SEARCH_POSITIVES)
        .count();

    // Tag completion: the test pictures with two or more known tags reveal ⌊n/2⌋.
    let (completion_rows, reveal) = reveal_half(&truth.lists, options.seed ^ REVEAL_SEED);
    let completion_x = test_x.select(Axis(0), &completion_rows);
    let mut completion = Completion {
        split: CompletionSplit {
            pictures: completion_rows.len(),
            revealed: reveal.revealed.iter().map(Vec::len).sum(),
            hidden: reveal.hidden.iter().map(Vec::len).sum(),
        },
        methods: BTreeMap::new(),
    };

    let train_set = TrainSet {
        features: train_x.view(),
        tags: &train_tags,
        n_tags,
        groups: &train_groups,
        seed: options.seed,
        variants: &train_variants,
    };
    let total = methods.len();
    let mut reports = BTreeMap::new();
    for (index, method) in methods.iter_mut().enumerate() {
        let name = method.name().to_string();
        on_progress(Progress::Fitting {
            method: &name,
            index,
            total,
        });
        let start = Instant::now();
        method.fit(&train_set)?;
        let fitted = start.elapsed().as_secs_f64();
        if !completion_rows.is_empty() {
            let start = Instant::now();
            let scores = method.score_given(completion_x.view(), &reveal.revealed)?;
            let seconds = fitted + start.elapsed().as_secs_f64();
            let parts = method.completion_parts(completion_x.view(), &reveal.revealed)?;
            for (part, scores) in std::iter::once((name.clone(), scores)).chain(parts) {
                check_scores(&part, &scores, completion_rows.len(), n_tags)?;
                let mut report = measure_completion(scores.view(), &reveal)?;
                if part == name {
                    report.settings = method.settings();
                }
                report.seconds = seconds;
                completion.methods.insert(part, report);
            }
        }
        if method.completion_only() {
            continue;
        }
        let start = Instant::now();
        let scores = method.score(test_x.view())?;
        let seconds = fitted + start.elapsed().as_secs_f64();
        check_scores(&name, &scores, truth.lists.len(), n_tags)?;
        on_progress(Progress::Measuring {
            method: &name,
            index,
            total,
        });
        let mut report = measure(scores.view(), &truth)?;
        if method.calibrated() {
            let correct: Vec<bool> = truth.matrix.iter().copied().collect();
            let stated: Vec<f32> = scores.iter().copied().collect();
            report.reliability = Some(Reliability::measure(&stated, &correct, RELIABILITY_BINS));
        }
        report.settings = method.settings();
        report.seconds = seconds;
        reports.insert(name, report);
    }

    Ok(Report {
        split: SplitSummary {
            seed: options.seed,
            train: train_rows.len(),
            train_untagged: parts.train.len() - train_rows.len(),
            test: parts.test.len(),
            test_without_known_tags: parts.test.len() - truth.lists.len(),
            vocabulary: n_tags,
            unseen_test_tags: unseen.len(),
            search_tags,
            search_pairs: truth.pairs.len(),
            mislabelled: truth.injection.noisy.iter().filter(|&&x| x).count(),
        },
        methods: reports,
        completion: (!completion_rows.is_empty()).then_some(completion),
        known_mislabels: None,
    })
}

#[cfg(test)]
mod tests {
    use std::cell::RefCell;
    use std::rc::Rc;

    use super::*;
    use crate::baselines::tests::synthetic;

    /// A synthetic collection as the CLI would pass it: string tags, and
    /// content keys where every tenth picture duplicates the one before.
    fn collection(n: usize, seed: u64) -> (Array2<f32>, Vec<Vec<String>>, Vec<String>) {
        let (mut x, idx) = synthetic(n, 12, 0.3, seed);
        let tags = idx
            .iter()
            .map(|row| row.iter().map(|t| format!("tag-{t}")).collect())
            .collect();
        let keys: Vec<String> = (0..n)
            .map(|i| format!("hash-{}", i - usize::from(i % 10 == 9)))
            .collect();
        for i in (9..n).step_by(10) {
            let prev = x.row(i - 1).to_owned();
            x.row_mut(i).assign(&prev);
        }
        (x, tags, keys)
    }

    fn run(x: &Array2<f32>, tags: &[Vec<String>], keys: &[String], seed: u64) -> Report {
        let options = EvalOptions {
            seed,
            ..EvalOptions::default()
        };
        evaluate(
            x.view(),
            tags,
            keys,
            &options,
            &mut baselines(),
            &mut |_| {},
        )
        .unwrap()
    }

    #[test]
    fn informative_features_rank_baselines_as_expected() {
        let (x, tags, keys) = collection(240, 5);
        let r = run(&x, &tags, &keys, 5);
        let (prior, knn, ridge) = (&r.methods["prior"], &r.methods["knn"], &r.methods["ridge"]);
        assert!(knn.lrap > 0.85 && ridge.lrap > 0.85, "{}", r.to_table());
        assert!(prior.lrap < knn.lrap - 0.25, "{}", r.to_table());
        assert!(knn.search_map.unwrap() > prior.search_map.unwrap() + 0.3);
        assert!(knn.search_map_pairs.unwrap() > prior.search_map_pairs.unwrap());
        assert!(knn.mislabel_auc.unwrap() > 0.8, "{}", r.to_table());
        // a method blind to the picture cannot tell a swapped tag set from a true one
        assert_eq!(prior.mislabel_auc, Some(0.5));
        assert!(knn.n_plus > prior.n_plus);
        assert_eq!(r.split.train + r.split.test, 240);
        assert_eq!(r.split.mislabelled, 3); // round(5 % of 60)
        assert!(r.split.search_pairs > 0);
    }

    #[test]
    fn same_seed_same_numbers() {
        let (x, tags, keys) = collection(120, 8);
        let strip = |mut r: Report| {
            r.methods.values_mut().for_each(|m| m.seconds = 0.0);
            r
        };
        let a = strip(run(&x, &tags, &keys, 3));
        assert_eq!(a, strip(run(&x, &tags, &keys, 3)));
        assert_ne!(a, strip(run(&x, &tags, &keys, 4)));
    }

    type Seen = Rc<RefCell<Vec<(Array2<f32>, Vec<Vec<usize>>)>>>;

    /// Records exactly what the runner hands it.
    struct Recorder {
        fitted_on: Seen,
        scored: Seen,
    }

    impl TagScorer for Recorder {
        fn name(&self) -> &str {
            "recorder"
        }
        fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
            self.fitted_on
                .borrow_mut()
                .push((train.features.to_owned(), train.tags.to_vec()));
            Ok(())
        }
        fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
            self.scored
                .borrow_mut()
                .push((features.to_owned(), Vec::new()));
            Ok(Array2::from_shape_fn((features.nrows(), 12), |(i, j)| {
                ((i * 7 + j) % 5) as f32
            }))
        }
    }

    /// Records the variants the runner hands a method.
    struct VariantRecorder(Rc<RefCell<Vec<Array2<f32>>>>);

    impl TagScorer for VariantRecorder {
        fn name(&self) -> &str {
            "variants"
        }
        fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
            assert!(train
                .variants
                .iter()
                .all(|v| v.dim() == train.features.dim()));
            self.0.borrow_mut().extend(train.variants.iter().cloned());
            Ok(())
        }
        fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
            Ok(Array2::from_shape_fn((features.nrows(), 12), |(i, j)| {
                ((i * 7 + j) % 5) as f32
            }))
        }
    }

    #[test]
    fn variants_of_train_pictures_reach_methods_scaled_like_the_features() {
        let (x, tags, keys) = collection(100, 2);
        let seed = 9;
        let parts = split(100, &keys, 0.75, seed).unwrap();
        let mirror = x.mapv(|v| 3.0 * v + 1.0);
        let crop = x.mapv(|v| -v);
        let seen = Rc::new(RefCell::new(Vec::new()));
        let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(VariantRecorder(seen.clone()))];
        let options = EvalOptions {
            seed,
            ..EvalOptions::default()
        };
        let variants = [mirror.view(), crop.view()];
        evaluate_with_variants(
            x.view(),
            &variants,
            &tags,
            &keys,
            &options,
            &mut methods,
            &mut |_| {},
        )
        .unwrap();
        // the features' standardiser (fitted on train originals), train rows only
        let standardiser = Standardiser::fit(x.select(Axis(0), &parts.train).view());
        let want: Vec<Array2<f32>> = [&mirror, &crop]
            .iter()
            .map(|v| standardiser.apply(v.select(Axis(0), &parts.train).view()))
            .collect();
        assert_eq!(*seen.borrow(), want);
        // without variants the methods get none
        seen.borrow_mut().clear();
        evaluate(x.view(), &tags, &keys, &options, &mut methods, &mut |_| {}).unwrap();
        assert!(seen.borrow().is_empty());
        // variants of the wrong shape are refused
        let short = x.slice(ndarray::s![..10, ..]);
        let narrow = x.slice(ndarray::s![.., ..3]);
        for (bad, wrong_rows) in [(short, true), (narrow, false)] {
            let e = evaluate_with_variants(
                x.view(),
                &[bad],
                &tags,
                &keys,
                &options,
                &mut methods,
                &mut |_| {},
            )
            .unwrap_err();
            assert_eq!(
                matches!(e, EvalError::LengthMismatch { got: 10, .. }),
                wrong_rows,
                "{e}"
            );
            assert_eq!(
                matches!(e, EvalError::VariantWidth { got: 3, .. }),
                !wrong_rows,
                "{e}"
            );
        }
    }

    #[test]
    fn methods_never_see_held_out_tags() {
        let (x, mut tags, keys) = collection(100, 2);
        let seed = 9;
        let parts = split(100, &keys, 0.75, seed).unwrap();
        // a canary tag on every test picture; the train tags are left untouched
        for &i in &parts.test {
            tags[i].push("held-out-canary".to_string());
        }
        let (fitted_on, scored) = (Seen::default(), Seen::default());
        let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(Recorder {
            fitted_on: fitted_on.clone(),
            scored: scored.clone(),
        })];
        let options = EvalOptions {
            seed,
            ..EvalOptions::default()
        };
        let report = evaluate(x.view(), &tags, &keys, &options, &mut methods, &mut |_| {}).unwrap();
        assert_eq!(report.split.unseen_test_tags, 1);

        let columns = TagColumns::from_items(parts.train.iter().map(|&i| tags[i].as_slice()));
        assert!(columns.index_of("held-out-canary").is_none());
        let standardiser = Standardiser::fit(x.select(Axis(0), &parts.train).view());
        let fitted = fitted_on.borrow();
        assert_eq!(fitted.len(), 1);
        let (features, got_tags) = &fitted[0];
        // exactly the train pictures (all tagged here), in order, with their own tags
        let want: Vec<Vec<usize>> = parts
            .train
            .iter()
            .map(|&i| columns.encode(&tags[i]))
            .collect();
        assert_eq!(got_tags, &want);
        assert_eq!(
            features,
            &standardiser.apply(x.select(Axis(0), &parts.train).view())
        );
        // scoring sees test features only, standardised with the train statistics
        let scored = scored.borrow();
        assert_eq!(
            scored[0].0,
            standardiser.apply(x.select(Axis(0), &parts.test).view())
        );
    }

    #[test]
    fn counts_unseen_and_unmeasurable_test_pictures() {
        let tags: Vec<Vec<String>> = [
            &["a", "b"][..],
            &["a"],
            &["b"],
            &["a", "b"],
            &["zz"],
            &[],
            &["a", "yy"],
            &["b", "yy", "xx"],
        ]
        .iter()
        .map(|t| t.iter().map(|s| s.to_string()).collect())
        .collect();
        let x = Array2::from_shape_fn((8, 3), |(i, j)| (i * 3 + j) as f32);
        let keys: Vec<String> = (0..8).map(|i| i.to_string()).collect();
        // find a seed whose test part holds pictures 4..8 only (train 0..4 carry a and b)
        let seed = (0..10_000u64)
            .find(|&s| split(8, &keys, 0.5, s).unwrap().test == vec![4, 5, 6, 7])
            .unwrap();
        let options = EvalOptions {
            seed,
            train_fraction: 0.5,
            ..EvalOptions::default()
        };
        let r = evaluate(
            x.view(),
            &tags,
            &keys,
            &options,
            &mut baselines(),
            &mut |_| {},
        )
        .unwrap();
        let s = &r.split;
        assert_eq!((s.train, s.test, s.vocabulary), (4, 4, 2));
        assert_eq!(s.unseen_test_tags, 3); // zz, yy, xx
        assert_eq!(s.test_without_known_tags, 2); // pictures 4 (zz only) and 5 (untagged)
    }

    #[test]
    fn report_serialises_and_renders() {
        let (x, tags, keys) = collection(80, 1);
        let mut progress = Vec::new();
        let r = evaluate(
            x.view(),
            &tags,
            &keys,
            &EvalOptions::default(),
            &mut baselines(),
            &mut |p| progress.push(format!("{p:?}")),
        )
        .unwrap();
        assert_eq!(progress.len(), 6);
        let json = serde_json::to_value(&r).unwrap();
        let top: Vec<&String> = json.as_object().unwrap().keys().collect();
        assert_eq!(top, ["methods", "split"]);
        let methods: Vec<&String> = json["methods"].as_object().unwrap().keys().collect();
        assert_eq!(methods, ["knn", "prior", "ridge"]);
        for key in ["seed", "train", "test", "vocabulary", "unseen_test_tags"] {
            assert!(json["split"][key].is_u64(), "{key}");
        }
        for key in [
            "lrap",
            "p_at_1",
            "p_at_5",
            "r_at_5",
            "coverage",
            "tag_precision",
            "tag_recall",
            "search_map",
            "mislabel_auc",
            "seconds",
        ] {
            assert!(json["methods"]["knn"][key].is_f64(), "{key}");
        }
        assert_eq!(
            json["methods"]["knn"]["settings"]
                .as_str()
                .map(|s| s.starts_with("k=")),
            Some(true)
        );
        let md = r.to_markdown();
        assert!(md.contains("| method | settings | LRAP |"));
        assert_eq!(md.lines().filter(|l| l.starts_with('|')).count(), 5);
        let table = r.to_table();
        assert_eq!(table.lines().count(), 5);
        assert!(table.lines().nth(2).unwrap().starts_with("knn "));

        let audit = crate::Audit {
            folds: 5,
            disputes: BTreeMap::from([
                ("knn".to_string(), vec![Some(0.8), Some(0.1), Some(0.3)]),
                ("prior".to_string(), vec![Some(0.5); 3]),
            ]),
        };
        let mut r = r;
        r.known_mislabels = Some(audit.against_known(&[true, false, false]).unwrap());
        let json = serde_json::to_value(&r).unwrap();
        let known = &json["known_mislabels"];
        assert_eq!(
            (&known["pictures"], &known["known"]),
            (&3.into(), &1.into())
        );
        assert_eq!(known["methods"]["knn"]["auc"], 1.0);
        assert_eq!(known["methods"]["prior"]["precision"], 1.0 / 3.0);
        let md = r.to_markdown();
        assert!(md.contains("| method | known-mislabel AUC | precision in top 1 |\n| --- | --- | --- |\n| knn | 1.000 | 1.000 |\n| prior | 0.500 | 0.333 |\n"), "{md}");
        let table = r.to_table();
        assert_eq!(table.lines().count(), 5 + 5);
        assert!(table.ends_with("\nmethod  known-mislabel AUC  precision in top 1\nknn                  1.000               1.000\nprior                0.500               0.333\n"), "{table}");
    }

    #[test]
    fn bad_inputs_are_refused_with_reasons() {
        let (mut x, tags, keys) = collection(40, 1);
        let o = EvalOptions::default();
        let e = evaluate(
            x.view(),
            &tags[..39],
            &keys,
            &o,
            &mut baselines(),
            &mut |_| {},
        );
        assert!(matches!(
            e,
            Err(EvalError::LengthMismatch {
                got: 39,
                expected: 40,
                ..
            })
        ));
        let e = evaluate(
            x.view(),
            &tags,
            &keys[..3],
            &o,
            &mut baselines(),
            &mut |_| {},
        );
        assert!(matches!(e, Err(EvalError::LengthMismatch { got: 3, .. })));
        let mut twice: Vec<Box<dyn TagScorer>> = vec![
            Box::new(PriorScorer::default()),
            Box::new(PriorScorer::default()),
        ];
        let e = evaluate(x.view(), &tags, &keys, &o, &mut twice, &mut |_| {});
        assert!(matches!(e, Err(EvalError::DuplicateMethod(_))));
        let wrong = EvalOptions {
            noise_fraction: 0.9,
            ..o.clone()
        };
        assert!(matches!(
            evaluate(
                x.view(),
                &tags,
                &keys,
                &wrong,
                &mut baselines(),
                &mut |_| {}
            ),
            Err(EvalError::BadNoiseFraction(_))
        ));
        x[[7, 2]] = f32::NAN;
        let e = evaluate(x.view(), &tags, &keys, &o, &mut baselines(), &mut |_| {});
        assert!(matches!(
            e,
            Err(EvalError::NonFiniteFeature { row: 7, col: 2 })
        ));
        let empty: Vec<Vec<String>> = vec![Vec::new(); 40];
        x[[7, 2]] = 0.0;
        let e = evaluate(x.view(), &empty, &keys, &o, &mut baselines(), &mut |_| {});
        assert!(matches!(e, Err(EvalError::EmptyVocabulary)));
    }

    /// Returns one column too few.
    struct Broken;

    impl TagScorer for Broken {
        fn name(&self) -> &str {
            "broken"
        }
        fn fit(&mut self, _: &TrainSet) -> Result<(), EvalError> {
            Ok(())
        }
        fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
            Ok(Array2::zeros((features.nrows(), 11)))
        }
    }

    #[test]
    fn wrongly_shaped_scores_name_the_method() {
        let (x, tags, keys) = collection(40, 1);
        let mut methods: Vec<Box<dyn TagScorer>> = vec![Box::new(Broken)];
        let e = evaluate(
            x.view(),
            &tags,
            &keys,
            &EvalOptions::default(),
            &mut methods,
            &mut |_| {},
        )
        .unwrap_err();
        assert!(
            e.to_string().contains("'broken'") && e.to_string().contains("x11"),
            "{e}"
        );
    }
}
