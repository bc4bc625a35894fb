//! Shared fixtures for the tests of several modules.

use std::collections::BTreeSet;

use ndarray::{Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use crate::ranking::{label_ranking_average_precision, mean};

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
            let set: BTreeSet<usize> = (0..count).map(|_| rng.random_range(0..n_tags)).collect();
            set.into_iter().collect()
        })
        .collect();
    let mut x = Array2::from_shape_fn((n, 2 * n_tags), |_| rng.random_range(-noise..noise));
    for (i, row) in tags.iter().enumerate() {
        row.iter().for_each(|&t| x[[i, t]] += 1.0);
    }
    (x, tags)
}

/// Mean LRAP of score rows against the tag lists they should rank first.
pub(crate) fn mean_lrap_of_lists(scores: ArrayView2<f32>, tags: &[Vec<usize>]) -> f64 {
    mean(scores.outer_iter().zip(tags).map(|(row, t)| {
        let mut rel = vec![false; row.len()];
        t.iter().for_each(|&j| rel[j] = true);
        label_ranking_average_precision(&row.to_vec(), &rel)
    }))
    .unwrap()
}
