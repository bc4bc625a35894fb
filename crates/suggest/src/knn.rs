//! k-nearest-neighbour tag transfer: a picture gets the tags of the pictures most like it.

use ndarray::{Array2, ArrayView1, ArrayView2, Axis};
use rayon::prelude::*;

use crate::train_set::{choose_by_cv, tag_frequencies};
use crate::{SuggestError, TrainSet};

/// Weight of train frequency added to kNN scores: far below any neighbour's
/// vote, it only orders tags that no neighbour carries (instead of tying them).
const KNN_TIE_BREAK: f32 = 1e-6;

fn rows_to_array(rows: Vec<Vec<f32>>, cols: usize) -> Array2<f32> {
    let n = rows.len();
    let flat: Vec<f32> = rows.into_iter().flatten().collect();
    Array2::from_shape_fn((n, cols), |(i, j)| flat[i * cols + j])
}

/// Most similarities held at once while scoring (pictures asked about × train pictures):
/// 256 MB of `f32`, so asking about many pictures among many tagged ones streams.
const SIMILARITIES_AT_ONCE: usize = 64 << 20;
/// Train pictures turned back into `f32` at once for one matrix product.
const TRAIN_CHUNK: usize = 2048;

/// Unit-length rows kept as one signed byte a value, each row with its own scale
/// (`value ≈ byte · scale`, `scale = max |value| / 127`; per-row 8-bit quantisation,
/// common practice for embedding search): a quarter of the memory of `f32`, so the tagged
/// pictures of a large collection stay in memory (100,000 × 3,700 values: 370 MB).
#[derive(Debug, Clone, Default)]
struct ByteRows {
    dim: usize,
    bytes: Vec<i8>,
    scales: Vec<f32>,
}

impl ByteRows {
    fn push(&mut self, row: ArrayView1<f32>) {
        self.dim = row.len();
        let largest = row.iter().fold(0.0f32, |m, v| m.max(v.abs()));
        let scale = if largest > 0.0 { largest / 127.0 } else { 1.0 };
        self.bytes.extend(
            row.iter()
                .map(|v| (v / scale).round().clamp(-127.0, 127.0) as i8),
        );
        self.scales.push(scale);
    }

    fn len(&self) -> usize {
        self.scales.len()
    }

    /// Rows `start..end` as `f32`.
    fn rows(&self, start: usize, end: usize) -> Array2<f32> {
        let bytes = &self.bytes[start * self.dim..end * self.dim];
        let mut out = Array2::zeros((end - start, self.dim));
        for ((mut row, held), &scale) in out
            .outer_iter_mut()
            .zip(bytes.chunks_exact(self.dim.max(1)))
            .zip(&self.scales[start..end])
        {
            row.iter_mut()
                .zip(held)
                .for_each(|(v, &b)| *v = f32::from(b) * scale);
        }
        out
    }

    /// Cosine similarities of unit rows `x` with every held row (x rows × held rows),
    /// a chunk of held rows at a time.
    fn similarities(&self, x: ArrayView2<f32>) -> Array2<f32> {
        let mut sims = Array2::zeros((x.nrows(), self.len()));
        // Each chunk's product goes straight to its place: gathering the parts first held
        // the similarities twice (268 MB more in an audit of 99,006 tagged pictures).
        sims.axis_chunks_iter_mut(Axis(1), TRAIN_CHUNK)
            .into_par_iter()
            .enumerate()
            .for_each(|(i, mut part)| {
                let start = i * TRAIN_CHUNK;
                let end = start + part.ncols();
                part.assign(&x.dot(&self.rows(start, end).t()));
            });
        sims
    }
}

/// Rows scaled to unit length (all-zero rows stay zero), so a dot product is
/// the cosine similarity.
pub fn unit_rows(x: ArrayView2<f32>) -> Array2<f32> {
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
    train_unit: ByteRows,
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
            train_unit: ByteRows::default(),
            train_tags: Vec::new(),
            frequency: Vec::new(),
        }
    }

    /// A kNN with `k` already chosen and no train pictures yet, to be given them a batch
    /// at a time ([`Self::add_train_pictures`]): a large collection's tagged pictures are
    /// never all in memory as `f32`.
    pub fn empty(k: usize, n_tags: usize) -> Self {
        KnnScorer {
            candidates: vec![k],
            k: Some(k),
            train_unit: ByteRows::default(),
            train_tags: Vec::new(),
            frequency: vec![0.0; n_tags],
        }
    }

    /// Adds train pictures (standardised features, their tag columns) to score against.
    pub fn add_train_pictures(&mut self, features: ArrayView2<f32>, tags: &[Vec<usize>]) {
        for row in unit_rows(features).outer_iter() {
            self.train_unit.push(row);
        }
        self.train_tags.extend_from_slice(tags);
        self.frequency = tag_frequencies(self.train_tags.iter(), self.frequency.len()).to_vec();
    }

    /// Train pictures held.
    pub fn train_len(&self) -> usize {
        self.train_unit.len()
    }

    /// A kNN with `k` already chosen (e.g. by an earlier `fit` on the same kind of
    /// data), ready to score: no cross-validation.
    pub fn with_fixed_k(k: usize, train: &TrainSet) -> Self {
        KnnScorer::fitted(vec![k], k, unit_rows(train.features), train)
    }

    /// Ready to score: `unit` = the train features scaled to unit length.
    fn fitted(candidates: Vec<usize>, k: usize, unit: Array2<f32>, train: &TrainSet) -> Self {
        let mut held = ByteRows::default();
        unit.outer_iter().for_each(|row| held.push(row));
        KnnScorer {
            candidates,
            k: Some(k),
            train_unit: held,
            train_tags: train.tags.to_vec(),
            frequency: tag_frequencies(train.tags.iter(), train.n_tags).to_vec(),
        }
    }

    /// Chooses k among the candidates by cross-validation on `train`, then keeps
    /// `train` to score against.
    pub fn fit(&mut self, train: &TrainSet) -> Result<(), SuggestError> {
        let k_max = *self
            .candidates
            .iter()
            .max()
            .ok_or(SuggestError::NoCandidates("kNN's k"))?;
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
            Ok::<_, SuggestError>(
                (0..self.candidates.len())
                    .map(|c| {
                        rows_to_array(per_row.iter().map(|r| r[c].clone()).collect(), train.n_tags)
                    })
                    .collect(),
            )
        })?;
        let k = self.candidates[choice];
        let candidates = std::mem::take(&mut self.candidates);
        *self = KnnScorer::fitted(candidates, k, unit, train);
        Ok(())
    }

    /// The k picked by the last `fit`.
    pub fn chosen_k(&self) -> Option<usize> {
        self.k
    }

    /// Scores (pictures × tag columns) of pictures given as standardised features.
    pub fn score(&self, features: ArrayView2<f32>) -> Result<Array2<f32>, SuggestError> {
        self.score_excluding(features, &vec![None; features.nrows()])
    }

    /// Like `score`, but row `i` never counts train picture `exclude[i]` among its
    /// neighbours: a train picture judged by the others (leave-one-out).
    pub fn score_excluding(
        &self,
        features: ArrayView2<f32>,
        exclude: &[Option<usize>],
    ) -> Result<Array2<f32>, SuggestError> {
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
    ) -> Result<Array2<f32>, SuggestError> {
        self.neighbour_votes(features, exclude, true)
    }

    fn neighbour_votes(
        &self,
        features: ArrayView2<f32>,
        exclude: &[Option<usize>],
        as_shares: bool,
    ) -> Result<Array2<f32>, SuggestError> {
        let k = self
            .k
            .ok_or_else(|| SuggestError::NotFitted("knn".into()))?;
        let unit = unit_rows(features);
        let batch = (SIMILARITIES_AT_ONCE / self.train_unit.len().max(1)).clamp(1, 4096);
        let mut rows: Vec<Vec<f32>> = Vec::with_capacity(unit.nrows());
        for (b, x) in unit.axis_chunks_iter(Axis(0), batch).enumerate() {
            let sims = self.train_unit.similarities(x);
            rows.par_extend((0..sims.nrows()).into_par_iter().map(|i| {
                let skip = exclude.get(b * batch + i).copied().flatten();
                let near = nearest(&sims.row(i).to_vec(), k, skip);
                let mut votes = transfer(&near, &self.train_tags, &self.frequency);
                let total: f32 = near.iter().map(|(_, s)| s.max(0.0)).sum();
                if as_shares && total > 0.0 {
                    votes.iter_mut().for_each(|v| *v = (*v / total).min(1.0));
                }
                votes
            }));
        }
        Ok(rows_to_array(rows, self.frequency.len()))
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::{mean_lrap_of_lists, synthetic};
    use ndarray::array;

    #[test]
    fn knn_learns_informative_features_and_prefers_k_above_one() {
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
        let mut knn = KnnScorer::default();
        knn.fit(&train).unwrap();
        let scores = knn.score(x.slice(ndarray::s![180.., ..])).unwrap();
        assert_eq!(scores.dim(), (60, 10));
        let lrap = mean_lrap_of_lists(scores.view(), &tags[180..]);
        assert!(lrap > 0.85, "knn {lrap}");
        assert!(
            knn.chosen_k().unwrap() > 1,
            "noisy features should not favour k=1"
        );
    }

    #[test]
    fn refuses_to_score_before_fit() {
        assert!(matches!(
            KnnScorer::default().score(Array2::<f32>::zeros((2, 3)).view()),
            Err(SuggestError::NotFitted(_))
        ));
        assert!(matches!(
            KnnScorer::with_k_candidates(vec![]).fit(&TrainSet {
                features: Array2::<f32>::zeros((2, 3)).view(),
                tags: &[vec![0], vec![0]],
                n_tags: 1,
                groups: &[0, 1],
                seed: 0,
                variants: &[],
            }),
            Err(SuggestError::NoCandidates(_))
        ));
    }

    #[test]
    fn knn_transfer_worked_example() {
        // worked by hand: query (1,0) has cosine 1 with (2,0), 0.6 with (3,4), -1 with (-1,0).
        // k=2 → neighbours 0 (tags a,b) and 1 (tag b): a = 1, b = 1.6; c (only on the
        // opposite picture) gets only its tie-break prior. The train rows are held as bytes:
        // (0.6, 0.8) becomes (95, 127) · 0.8/127, a cosine of 0.5984, so sums are checked to
        // within that quantisation (max |v| / 254 a value).
        let tol = 0.8 / 254.0 + 1e-6;
        let train_x = array![[2.0f32, 0.0], [3.0, 4.0], [-1.0, 0.0]];
        let tags = vec![vec![0, 1], vec![1], vec![2]];
        let mut knn = KnnScorer::with_k_candidates(vec![2]);
        let set = TrainSet {
            features: train_x.view(),
            tags: &tags,
            n_tags: 3,
            groups: &[0, 1, 2],
            seed: 0,
            variants: &[],
        };
        knn.fit(&set).unwrap();
        let s = knn.score(array![[1.0f32, 0.0]].view()).unwrap();
        let tb = KNN_TIE_BREAK / 3.0;
        for (got, want) in s.iter().zip([1.0 + tb, 1.6 + 2.0 * tb, tb]) {
            assert!((got - want).abs() < tol, "{s}");
        }
        // as shares of the neighbours' similarity 1 + 0.6: a 1/1.6, b 1.6/1.6 (capped at 1)
        let shares = knn
            .shares_excluding(array![[1.0f32, 0.0]].view(), &[None])
            .unwrap();
        assert!((shares[[0, 0]] - 1.0 / 1.6).abs() < tol, "{shares}");
        assert_eq!(shares[[0, 1]], 1.0);
        // leaving train picture 0 out: neighbours 1 (0.6) and 2 (clipped to 0)
        let without = knn
            .score_excluding(array![[1.0f32, 0.0]].view(), &[Some(0)])
            .unwrap();
        assert!(
            (without[[0, 1]] - (0.6 + 2.0 * tb)).abs() < tol,
            "{without}"
        );
        assert!((without[[0, 0]] - tb).abs() < 1e-6, "{without}");
    }

    // Per-row 8-bit quantisation (common practice for embedding search): each value comes
    // back within half a step, max |v| / 254.
    #[test]
    fn byte_rows_keep_each_value_within_half_a_step() {
        let (x, _) = synthetic(40, 6, 0.5, 9);
        let unit = unit_rows(x.view());
        let mut held = ByteRows::default();
        unit.outer_iter().for_each(|row| held.push(row));
        let back = held.rows(0, held.len());
        for (row, got) in unit.outer_iter().zip(back.outer_iter()) {
            let half_step = row.iter().fold(0.0f32, |m, v| m.max(v.abs())) / 254.0;
            for (a, b) in row.iter().zip(got.iter()) {
                assert!((a - b).abs() <= half_step + 1e-7, "{a} vs {b}");
            }
        }
    }

    // Train pictures given a batch at a time score exactly as when given at once.
    #[test]
    fn train_pictures_added_in_batches_score_as_if_given_at_once() {
        let (x, tags) = synthetic(300, 8, 0.5, 5);
        let groups: Vec<usize> = (0..250).collect();
        let train = TrainSet {
            features: x.slice(ndarray::s![..250, ..]),
            tags: &tags[..250],
            n_tags: 8,
            groups: &groups,
            seed: 5,
            variants: &[],
        };
        let at_once = KnnScorer::with_fixed_k(10, &train);
        let mut batched = KnnScorer::empty(10, 8);
        for start in (0..250).step_by(100) {
            let end = (start + 100).min(250);
            batched.add_train_pictures(x.slice(ndarray::s![start..end, ..]), &tags[start..end]);
        }
        assert_eq!(batched.train_len(), 250);
        let asked = x.slice(ndarray::s![250.., ..]);
        assert_eq!(at_once.score(asked).unwrap(), batched.score(asked).unwrap());
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
        assert!(mean_lrap_of_lists(loo.view(), &ts) > 0.85);
    }
}
