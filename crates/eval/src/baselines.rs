//! The interface every evaluated method implements, and the baselines any
//! new method must beat: tag frequency, k-nearest-neighbour tag transfer and
//! ridge regression from features to tags.

use std::collections::BTreeSet;

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::linalg::cholesky_solve;
use crate::metrics::label_ranking_average_precision;
use crate::EvalError;

/// What a method may learn from: train pictures only. The runner builds it
/// from the train part of the split, so held-out tags cannot reach `fit`.
#[derive(Debug, Clone, Copy)]
pub struct TrainSet<'a> {
    /// Standardised features, one row per train picture.
    pub features: ArrayView2<'a, f32>,
    /// Vocabulary indices carried by each train picture (each non-empty).
    pub tags: &'a [Vec<usize>],
    /// Vocabulary size: the number of score columns to produce.
    pub n_tags: usize,
    /// Content group of each row; cross-validation keeps a group in one fold
    /// so duplicates cannot make a setting look better than it is.
    pub groups: &'a [usize],
    /// Seed for any randomness inside `fit`.
    pub seed: u64,
    /// Views of the train pictures (mirrored, cropped…), standardised like `features`:
    /// `views[v]` row `i` is view `v` of row `i` and carries its tags. Only the joint
    /// model trains on them; the baselines ignore them. Empty = none.
    pub views: &'a [Array2<f32>],
}

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

const CV_FOLDS: usize = 5;

/// Fraction of the given pictures carrying each tag.
fn tag_frequencies<'a>(
    tags: impl ExactSizeIterator<Item = &'a Vec<usize>>,
    n_tags: usize,
) -> Array1<f32> {
    let n = tags.len().max(1) as f32;
    let mut counts = Array1::<f32>::zeros(n_tags);
    for &t in tags.flatten() {
        counts[t] += 1.0;
    }
    counts / n
}

fn rows_to_array(rows: Vec<Vec<f32>>, cols: usize) -> Array2<f32> {
    let n = rows.len();
    let flat: Vec<f32> = rows.into_iter().flatten().collect();
    Array2::from_shape_fn((n, cols), |(i, j)| flat[i * cols + j])
}

/// Validation row lists of up to `n_folds` folds; content groups are
/// shuffled (seeded) and dealt round-robin. Empty if fewer than 2 groups.
pub(crate) fn grouped_folds(groups: &[usize], n_folds: usize, seed: u64) -> Vec<Vec<usize>> {
    let mut distinct: Vec<usize> = groups
        .iter()
        .copied()
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let n_folds = n_folds.min(distinct.len());
    if n_folds < 2 {
        return Vec::new();
    }
    distinct.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let mut folds = vec![Vec::new(); n_folds];
    for (pos, g) in distinct.iter().enumerate() {
        folds[pos % n_folds].extend(
            groups
                .iter()
                .enumerate()
                .filter(|(_, x)| *x == g)
                .map(|(i, _)| i),
        );
    }
    folds.iter_mut().for_each(|f| f.sort_unstable());
    folds
}

/// Index of the candidate with the best LRAP over all cross-validation
/// pictures (first one on ties), or the middle candidate when the train part
/// is too small to cross-validate. `score_fold(fit_rows, val_rows)` returns
/// one score matrix (validation rows × tags) per candidate.
fn choose_by_cv(
    train: &TrainSet,
    n_candidates: usize,
    score_fold: impl Fn(&[usize], &[usize]) -> Result<Vec<Array2<f32>>, EvalError>,
) -> Result<usize, EvalError> {
    let folds = grouped_folds(train.groups, CV_FOLDS, train.seed);
    if folds.is_empty() {
        return Ok(n_candidates / 2);
    }
    let mut totals = vec![0.0; n_candidates];
    for val in &folds {
        let in_val: BTreeSet<usize> = val.iter().copied().collect();
        let fit: Vec<usize> = (0..train.tags.len())
            .filter(|i| !in_val.contains(i))
            .collect();
        for (total, scores) in totals.iter_mut().zip(score_fold(&fit, val)?) {
            for (row, &item) in scores.outer_iter().zip(val) {
                let mut relevant = vec![false; train.n_tags];
                train.tags[item].iter().for_each(|&t| relevant[t] = true);
                *total += label_ranking_average_precision(&row.to_vec(), &relevant);
            }
        }
    }
    Ok(totals
        .iter()
        .enumerate()
        .fold(0, |best, (i, &t)| if t > totals[best] { i } else { best }))
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
            .ok_or_else(|| EvalError::NotFitted(self.name().into()))?;
        Ok(Array2::from_shape_fn(
            (features.nrows(), freq.len()),
            |(_, t)| freq[t],
        ))
    }
}

/// Weight of train frequency added to kNN scores: far below any neighbour's
/// vote, it only orders tags that no neighbour carries (instead of tying them).
const KNN_TIE_BREAK: f32 = 1e-6;

/// Rows scaled to unit length (all-zero rows stay zero), so a dot product is
/// the cosine similarity.
fn unit_rows(x: ArrayView2<f32>) -> Array2<f32> {
    let mut out = x.to_owned();
    for mut row in out.outer_iter_mut() {
        let norm = row.dot(&row).sqrt();
        if norm > 0.0 {
            row /= norm;
        }
    }
    out
}

/// The `k` most similar rows (similarity descending, then index ascending,
/// so the result is deterministic), never `exclude`.
fn nearest(similarities: &[f32], k: usize, exclude: Option<usize>) -> Vec<(usize, f32)> {
    let mut all: Vec<(usize, f32)> = similarities
        .iter()
        .copied()
        .enumerate()
        .filter(|&(i, _)| Some(i) != exclude)
        .collect();
    let order = |a: &(usize, f32), b: &(usize, f32)| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0));
    if k < all.len() {
        all.select_nth_unstable_by(k, order);
        all.truncate(k);
    }
    all.sort_unstable_by(order);
    all
}

/// score(tag) = Σ over neighbours of max(similarity, 0) · carries(tag), plus
/// the tie-break prior. Negative similarities are clipped rather than shifted
/// so that close neighbours keep their full advantage over merely-not-opposite ones.
fn transfer(neighbours: &[(usize, f32)], tags: &[Vec<usize>], tie_break: &[f32]) -> Vec<f32> {
    let mut scores: Vec<f32> = tie_break.iter().map(|f| f * KNN_TIE_BREAK).collect();
    for &(j, sim) in neighbours {
        for &t in &tags[j] {
            scores[t] += sim.max(0.0);
        }
    }
    scores
}

/// k-nearest-neighbour tag transfer on cosine similarity, k chosen by
/// grouped 5-fold cross-validation on the train pictures (best LRAP).
#[derive(Debug, Clone)]
pub struct KnnScorer {
    candidates: Vec<usize>,
    k: Option<usize>,
    train_unit: Array2<f32>,
    train_tags: Vec<Vec<usize>>,
    frequency: Vec<f32>,
}

impl Default for KnnScorer {
    fn default() -> Self {
        Self::with_k_candidates(vec![1, 3, 5, 10, 20, 40])
    }
}

impl KnnScorer {
    pub fn with_k_candidates(candidates: Vec<usize>) -> Self {
        KnnScorer {
            candidates,
            k: None,
            train_unit: Array2::zeros((0, 0)),
            train_tags: Vec::new(),
            frequency: Vec::new(),
        }
    }

    /// The k picked by the last `fit`.
    pub fn chosen_k(&self) -> Option<usize> {
        self.k
    }

    /// Like `score`, but row `i` never counts train picture `exclude[i]` among its
    /// neighbours: a train picture judged by the others (leave-one-out).
    pub fn score_excluding(
        &self,
        features: ArrayView2<f32>,
        exclude: &[Option<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        self.neighbour_votes(features, exclude, false)
    }

    /// Like [`Self::score_excluding`], each row divided by its neighbours' total
    /// (positive) similarity: the similarity-weighted share of the `k` nearest
    /// pictures that carry each tag, in [0, 1] — "7 of the 10 most similar
    /// pictures carry it" as a number people can read.
    pub fn shares_excluding(
        &self,
        features: ArrayView2<f32>,
        exclude: &[Option<usize>],
    ) -> Result<Array2<f32>, EvalError> {
        self.neighbour_votes(features, exclude, true)
    }

    fn neighbour_votes(
        &self,
        features: ArrayView2<f32>,
        exclude: &[Option<usize>],
        as_shares: bool,
    ) -> Result<Array2<f32>, EvalError> {
        let k = self.k.ok_or_else(|| EvalError::NotFitted("knn".into()))?;
        let sims = unit_rows(features).dot(&self.train_unit.t());
        let rows: Vec<Vec<f32>> = (0..sims.nrows())
            .into_par_iter()
            .map(|i| {
                let skip = exclude.get(i).copied().flatten();
                let near = nearest(&sims.row(i).to_vec(), k, skip);
                let mut votes = transfer(&near, &self.train_tags, &self.frequency);
                let total: f32 = near.iter().map(|(_, s)| s.max(0.0)).sum();
                if as_shares && total > 0.0 {
                    votes.iter_mut().for_each(|v| *v = (*v / total).min(1.0));
                }
                votes
            })
            .collect();
        Ok(rows_to_array(rows, self.frequency.len()))
    }

    /// A kNN with `k` already chosen (e.g. by an earlier `fit` on the same kind of
    /// data), ready to score: no cross-validation.
    pub fn with_fixed_k(k: usize, train: &TrainSet) -> Self {
        KnnScorer::fitted(vec![k], k, unit_rows(train.features), train)
    }

    /// Ready to score: `unit` = the train features scaled to unit length.
    fn fitted(candidates: Vec<usize>, k: usize, unit: Array2<f32>, train: &TrainSet) -> Self {
        KnnScorer {
            candidates,
            k: Some(k),
            train_unit: unit,
            train_tags: train.tags.to_vec(),
            frequency: tag_frequencies(train.tags.iter(), train.n_tags).to_vec(),
        }
    }
}

impl TagScorer for KnnScorer {
    fn name(&self) -> &str {
        "knn"
    }

    fn fit(&mut self, train: &TrainSet) -> Result<(), EvalError> {
        let k_max = *self
            .candidates
            .iter()
            .max()
            .ok_or(EvalError::NoCandidates("kNN's k"))?;
        let unit = unit_rows(train.features);
        let choice = choose_by_cv(train, self.candidates.len(), |fit, val| {
            let fit_unit = unit.select(Axis(0), fit);
            let sims = unit.select(Axis(0), val).dot(&fit_unit.t());
            let fit_tags: Vec<Vec<usize>> = fit.iter().map(|&i| train.tags[i].clone()).collect();
            let freq = tag_frequencies(fit_tags.iter(), train.n_tags).to_vec();
            let per_row: Vec<Vec<Vec<f32>>> = (0..val.len())
                .into_par_iter()
                .map(|p| {
                    let near = nearest(&sims.row(p).to_vec(), k_max, None);
                    self.candidates
                        .iter()
                        .map(|&k| transfer(&near[..k.min(near.len())], &fit_tags, &freq))
                        .collect()
                })
                .collect();
            Ok((0..self.candidates.len())
                .map(|c| {
                    rows_to_array(per_row.iter().map(|r| r[c].clone()).collect(), train.n_tags)
                })
                .collect())
        })?;
        let k = self.candidates[choice];
        let candidates = std::mem::take(&mut self.candidates);
        *self = KnnScorer::fitted(candidates, k, unit, train);
        Ok(())
    }

    fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, EvalError> {
        self.score_excluding(features, &vec![None; features.nrows()])
    }

    fn settings(&self) -> Option<String> {
        self.k.map(|k| format!("k={k}"))
    }
}

/// Every picture scored from its `k` most cosine-similar OTHER pictures
/// (same rule as [`KnnScorer`], tie-break frequencies leaving the picture
/// out too): a quick check of how much tag information features carry.
/// Standardise the features first if their dimensions differ in scale.
pub fn knn_leave_one_out_scores(
    features: ArrayView2<f32>,
    truth: &[Vec<usize>],
    n_tags: usize,
    k: usize,
) -> Array2<f32> {
    let unit = unit_rows(features);
    let sims = unit.dot(&unit.t());
    let counts = tag_frequencies(truth.iter(), n_tags) * truth.len() as f32;
    let others = truth.len().saturating_sub(1).max(1) as f32;
    let rows: Vec<Vec<f32>> = (0..truth.len())
        .into_par_iter()
        .map(|i| {
            let mut freq: Vec<f32> = counts.to_vec();
            truth[i].iter().for_each(|&t| freq[t] -= 1.0);
            freq.iter_mut().for_each(|f| *f /= others);
            transfer(&nearest(&sims.row(i).to_vec(), k, Some(i)), truth, &freq)
        })
        .collect();
    rows_to_array(rows, n_tags)
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

fn indicator(tags: &[Vec<usize>], n_tags: usize) -> Array2<f32> {
    let mut y = Array2::zeros((tags.len(), n_tags));
    for (i, row) in tags.iter().enumerate() {
        row.iter().for_each(|&t| y[[i, t]] = 1.0);
    }
    y
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
            return Err(EvalError::NoCandidates("ridge strength lambda"));
        }
        let y = indicator(train.tags, train.n_tags);
        let choice = choose_by_cv(train, self.candidates.len(), |fit, val| {
            let system = RidgeSystem::new(
                train.features.select(Axis(0), fit).view(),
                y.select(Axis(0), fit).view(),
            );
            let inputs = system.inputs(train.features.select(Axis(0), val).view());
            self.candidates
                .par_iter()
                .map(|&lambda| {
                    Ok(affine(
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
            .ok_or_else(|| EvalError::NotFitted(self.name().into()))?;
        Ok(model.predict(features))
    }

    fn settings(&self) -> Option<String> {
        self.lambda.map(|l| format!("lambda={l}"))
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::metrics::mean;
    use ndarray::array;
    use rand::Rng;

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
            views: &[],
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
            Err(EvalError::NotFitted(_))
        ));
        assert!(matches!(
            KnnScorer::default().score(x.view()),
            Err(EvalError::NotFitted(_))
        ));
        assert!(matches!(
            RidgeScorer::default().score(x.view()),
            Err(EvalError::NotFitted(_))
        ));
    }

    #[test]
    fn knn_transfer_worked_example() {
        // worked by hand: query (1,0) has cosine 1 with (2,0), 0.6 with (3,4), -1 with (-1,0).
        // k=2 → neighbours 0 (tags a,b) and 1 (tag b): a = 1, b = 1.6; c (only on the
        // opposite picture) gets only its tie-break prior.
        let train_x = array![[2.0f32, 0.0], [3.0, 4.0], [-1.0, 0.0]];
        let tags = vec![vec![0, 1], vec![1], vec![2]];
        let mut knn = KnnScorer::with_k_candidates(vec![2]);
        let set = TrainSet {
            features: train_x.view(),
            tags: &tags,
            n_tags: 3,
            groups: &[0, 1, 2],
            seed: 0,
            views: &[],
        };
        knn.fit(&set).unwrap();
        let s = knn.score(array![[1.0f32, 0.0]].view()).unwrap();
        let tb = KNN_TIE_BREAK / 3.0;
        for (got, want) in s.iter().zip([1.0 + tb, 1.6 + 2.0 * tb, tb]) {
            assert!((got - want).abs() < 1e-6, "{s}");
        }
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
        let y = indicator(&tags, 5);
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

    #[test]
    fn leave_one_out_never_uses_the_item_itself() {
        // Two identical pictures with different tags: each must get the other's tag.
        let x = array![[1.0f32, 0.0], [1.0, 0.0], [0.0, 1.0]];
        let tags = vec![vec![0], vec![1], vec![2]];
        let s = knn_leave_one_out_scores(x.view(), &tags, 3, 1);
        assert!(s[[0, 1]] > 0.9 && s[[0, 0]] < 1e-3, "{s}");
        assert!(s[[1, 0]] > 0.9 && s[[1, 1]] < 1e-3, "{s}");
        let (xs, ts) = synthetic(150, 8, 0.5, 4);
        let loo = knn_leave_one_out_scores(xs.view(), &ts, 8, 10);
        assert!(mean_lrap(loo.view(), &ts) > 0.85);
    }

    #[test]
    fn grouped_folds_keep_groups_together_and_cover_all_rows() {
        let groups = [0, 0, 1, 2, 2, 3, 4, 5, 6, 6];
        let folds = grouped_folds(&groups, 5, 5);
        assert_eq!(folds.len(), 5);
        let mut all: Vec<usize> = folds.concat();
        all.sort_unstable();
        assert_eq!(all, (0..10).collect::<Vec<_>>());
        for f in &folds {
            assert_eq!(f.contains(&0), f.contains(&1));
            assert_eq!(f.contains(&8), f.contains(&9));
        }
        assert!(grouped_folds(&[3, 3], 5, 1).is_empty());
        assert_eq!(grouped_folds(&groups, 3, 5).len(), 3);
    }
}
