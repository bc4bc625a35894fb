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
        tagging_order: None,
    })
}

#[cfg(test)]
#[path = "runner_tests.rs"]
mod tests;
