//! Deliberately swapped tags, and how strongly a method disputes the tags a
//! picture carries: the basis of the mislabel-finding measurement.

use ndarray::ArrayView2;
use rand::seq::{IndexedRandom, SliceRandom};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::metrics::{column_midranks, mean};

/// Tag sets after injection, and which pictures were given someone else's set.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Injection {
    pub tags: Vec<Vec<usize>>,
    pub noisy: Vec<bool>,
}

/// Gives `round(fraction · n)` seeded-random pictures (at least one when
/// `fraction > 0` and n ≥ 2) the complete tag set of another, randomly drawn
/// picture whose set differs from theirs — the typical archive slip of tags
/// pasted onto the wrong file. Donor sets are taken before any replacement;
/// a picture with no differing donor stays clean and is not marked noisy.
pub fn inject_mislabels(tags: &[Vec<usize>], fraction: f64, seed: u64) -> Injection {
    let n = tags.len();
    let wanted = if fraction > 0.0 && n >= 2 {
        ((fraction * n as f64).round() as usize).clamp(1, n)
    } else {
        0
    };
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut rng);
    let mut out = tags.to_vec();
    let mut noisy = vec![false; n];
    for &i in &order[..wanted] {
        let donors: Vec<usize> = (0..n).filter(|&j| tags[j] != tags[i]).collect();
        if let Some(&d) = donors.choose(&mut rng) {
            out[i] = tags[d].clone();
            noisy[i] = true;
        }
    }
    Injection { tags: out, noisy }
}

/// How much a method disputes each picture's carried tags: 1 − the mean,
/// over the carried tags, of the picture's position among all scored
/// pictures for that tag ((mid-rank − ½) / n, so in (0, 1)). Ranking within
/// a tag's column asks "is this picture unusual for this tag?" and makes any
/// score scale usable. The −½ centres a tied column on exactly ½ whatever n,
/// so a method that ignores the picture (equal columns) gives every picture
/// 0.5 — ROC AUC 0.5 even when values from differently sized score matrices
/// are pooled, as the out-of-fold audit does. A picture with no tags scores 0.
pub fn disagreement(scores: ArrayView2<f32>, carried: &[Vec<usize>]) -> Vec<f64> {
    let n = scores.nrows() as f64;
    let position = (column_midranks(scores) - 0.5) / n;
    carried
        .iter()
        .enumerate()
        .map(|(i, tags)| mean(tags.iter().map(|&t| position[[i, t]])).map_or(0.0, |m| 1.0 - m))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn injection_is_seeded_counted_and_really_changes_sets() {
        let tags: Vec<Vec<usize>> = (0..100).map(|i| vec![i % 7, 7 + i % 3]).collect();
        let a = inject_mislabels(&tags, 0.05, 11);
        assert_eq!(a, inject_mislabels(&tags, 0.05, 11));
        assert_ne!(a.noisy, inject_mislabels(&tags, 0.05, 12).noisy);
        assert_eq!(a.noisy.iter().filter(|&&x| x).count(), 5);
        for i in 0..100 {
            assert_eq!(a.noisy[i], a.tags[i] != tags[i]);
            if a.noisy[i] {
                assert!(tags.contains(&a.tags[i]), "carries another picture's set");
            }
        }
        assert_eq!(
            inject_mislabels(&tags[..10], 0.01, 1)
                .noisy
                .iter()
                .filter(|&&x| x)
                .count(),
            1
        );
        assert!(!inject_mislabels(&tags, 0.0, 1).noisy.contains(&true));
        let same = vec![vec![1, 2]; 5];
        assert!(
            !inject_mislabels(&same, 0.5, 1).noisy.contains(&true),
            "no differing donor"
        );
    }

    #[test]
    fn disagreement_worked_example() {
        // worked by hand: mid-ranks per column, then (rank − ½) / 3 —
        // tag 0: ranks [3, 2, 1] → [5/6, 1/2, 1/6]; tag 1: ranks [1, 3, 2] → [1/6, 5/6, 1/2].
        // picture 0 carries {0}: 1 − 5/6 = 1/6; picture 1 carries {0,1}: 1 − (1/2+5/6)/2 = 1/3;
        // picture 2 carries {0}: 1 − 1/6 = 5/6; picture 3 carries nothing: 0.
        let scores = array![[0.9f32, 0.1], [0.5, 0.8], [0.2, 0.3]];
        let d = disagreement(scores.view(), &[vec![0], vec![0, 1], vec![0]]);
        for (got, want) in d.iter().zip([1.0 / 6.0, 1.0 / 3.0, 5.0 / 6.0]) {
            assert!((got - want).abs() < 1e-12, "{d:?}");
        }
        assert_eq!(
            disagreement(scores.view(), &[vec![], vec![0], vec![1]])[0],
            0.0
        );
        // a picture-blind method disputes every picture by exactly ½, for any n
        for n in [2, 3, 7] {
            let flat = ndarray::Array2::from_elem((n, 2), 0.4f32);
            let carried: Vec<Vec<usize>> = (0..n).map(|i| vec![i % 2]).collect();
            assert!(disagreement(flat.view(), &carried)
                .iter()
                .all(|&v| v == 0.5));
        }
    }
}
