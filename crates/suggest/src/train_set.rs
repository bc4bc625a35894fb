//! What a method learns from, and the grouped cross-validation that chooses its settings.

use std::collections::{BTreeSet, HashMap};

use ndarray::{Array1, Array2, ArrayView2};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::ranking::label_ranking_average_precision;

/// What a method may learn from: train pictures only. Training for the product builds it
/// from every tagged picture; the evaluation runner from the train part of its split, so
/// held-out tags cannot reach `fit`.
#[derive(Debug, Clone, Copy)]
pub struct TrainSet<'a> {
    /// Standardised features, one row per train picture.
    pub features: ArrayView2<'a, f32>,
    /// Column indices of the tags carried by each train picture (each non-empty).
    pub tags: &'a [Vec<usize>],
    /// Number of tag columns: the number of score columns to produce.
    pub n_tags: usize,
    /// Content group of each row; cross-validation keeps a group in one fold
    /// so duplicates cannot make a setting look better than it is.
    pub groups: &'a [usize],
    /// Seed for any randomness inside `fit`.
    pub seed: u64,
    /// Variants of the train pictures (mirrored, cropped…), standardised like `features`:
    /// `variants[v]` row `i` is variant `v` of row `i` and carries its tags. Only the joint
    /// model trains on them; the baselines ignore them. Empty = none.
    pub variants: &'a [Array2<f32>],
}

/// Some rows of a [`TrainSet`], owned, to fit a method on part of the pictures.
pub struct TrainRows {
    features: Array2<f32>,
    tags: Vec<Vec<usize>>,
    groups: Vec<usize>,
}

impl TrainRows {
    pub fn of(train: &TrainSet, rows: &[usize]) -> Self {
        TrainRows {
            features: train.features.select(ndarray::Axis(0), rows),
            tags: rows.iter().map(|&i| train.tags[i].clone()).collect(),
            groups: rows.iter().map(|&i| train.groups[i]).collect(),
        }
    }

    /// As a train set with `like`'s tag columns and seed, without variants.
    pub fn train_set<'a>(&'a self, like: &TrainSet) -> TrainSet<'a> {
        TrainSet {
            features: self.features.view(),
            tags: &self.tags,
            n_tags: like.n_tags,
            groups: &self.groups,
            seed: like.seed,
            variants: &[],
        }
    }
}

/// Folds of the cross-validation that chooses a method's setting.
const CV_FOLDS: usize = 5;

/// 0/1 matrix (pictures × tag columns) of the tag lists.
pub fn tag_matrix(tags: &[Vec<usize>], n_tags: usize) -> Array2<f32> {
    let mut y = Array2::zeros((tags.len(), n_tags));
    for (i, row) in tags.iter().enumerate() {
        row.iter().for_each(|&t| y[[i, t]] = 1.0);
    }
    y
}

/// Fraction of the given pictures carrying each tag.
pub fn tag_frequencies<'a>(
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

/// Group id per item: items sharing a non-empty content key share a group
/// (exact duplicates must land on the same side, or the test part leaks);
/// an empty key means "unknown" and makes the item its own group. Ids are
/// numbered in order of first appearance so they do not depend on hashing.
pub fn group_ids<K: AsRef<str>>(content_keys: &[K]) -> Vec<usize> {
    let mut seen: HashMap<&str, usize> = HashMap::new();
    let mut next = 0;
    let mut ids = Vec::with_capacity(content_keys.len());
    for key in content_keys {
        let key = key.as_ref();
        let id = match seen.get(key) {
            Some(&id) => id,
            None => {
                if !key.is_empty() {
                    seen.insert(key, next);
                }
                next += 1;
                next - 1
            }
        };
        ids.push(id);
    }
    ids
}

/// Validation row lists of up to `n_folds` folds; content groups are
/// shuffled (seeded) and dealt round-robin. Empty if fewer than 2 groups.
pub fn grouped_folds(groups: &[usize], n_folds: usize, seed: u64) -> Vec<Vec<usize>> {
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
/// pictures (grouped 5-fold; first one on ties), or the middle candidate when the
/// train part is too small to cross-validate. `score_fold(fit_rows, val_rows)` returns
/// one score matrix (validation rows × tags) per candidate.
pub fn choose_by_cv<E>(
    train: &TrainSet,
    n_candidates: usize,
    score_fold: impl Fn(&[usize], &[usize]) -> Result<Vec<Array2<f32>>, E>,
) -> Result<usize, E> {
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

#[cfg(test)]
mod tests {
    use super::*;

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

    // worked by hand: duplicate keys share the id of their first appearance, an empty key
    // is a group of its own each time.
    #[test]
    fn group_ids_number_content_keys_in_order_of_appearance() {
        let keys: Vec<String> = ["a", "b", "a", "", "", "b", "c"]
            .iter()
            .map(|s| s.to_string())
            .collect();
        assert_eq!(group_ids(&keys), vec![0, 1, 0, 2, 3, 1, 4]);
    }

    // worked by hand: rows carry [0, 2] and [1]; frequencies 1/2 for each tag.
    #[test]
    fn tag_matrix_and_frequencies_of_two_rows() {
        let tags = vec![vec![0, 2], vec![1]];
        assert_eq!(
            tag_matrix(&tags, 3),
            ndarray::array![[1.0f32, 0.0, 1.0], [0.0, 1.0, 0.0]]
        );
        assert_eq!(tag_frequencies(tags.iter(), 3).to_vec(), vec![0.5f32; 3]);
    }
}
