//! Train/test split grouped by content.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use tagweave_suggest::group_ids;

use crate::EvalError;

/// Indices of train and test pictures, each list ascending.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Split {
    pub train: Vec<usize>,
    pub test: Vec<usize>,
}

/// Seeded shuffle of content groups, filled into train until it holds
/// `round(train_fraction * n_items)` items; the rest is test. Both parts are
/// non-empty (the last group goes to test if test would otherwise be empty).
pub fn split(
    n_items: usize,
    content_keys: &[String],
    train_fraction: f64,
    seed: u64,
) -> Result<Split, EvalError> {
    if content_keys.len() != n_items {
        return Err(EvalError::LengthMismatch {
            what: "content key list",
            got: content_keys.len(),
            expected: n_items,
        });
    }
    if !(train_fraction > 0.0 && train_fraction < 1.0) {
        return Err(EvalError::BadFraction(train_fraction));
    }
    let ids = group_ids(content_keys);
    let n_groups = ids.iter().max().map_or(0, |m| m + 1);
    if n_groups < 2 {
        return Err(EvalError::TooFewItems {
            items: n_items,
            groups: n_groups,
        });
    }
    let mut members: Vec<Vec<usize>> = vec![Vec::new(); n_groups];
    for (item, &g) in ids.iter().enumerate() {
        members[g].push(item);
    }
    let mut order: Vec<usize> = (0..n_groups).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let target = ((train_fraction * n_items as f64).round() as usize).clamp(1, n_items - 1);
    let (mut train, mut test) = (Vec::new(), Vec::new());
    for (pos, &g) in order.iter().enumerate() {
        let last = pos + 1 == order.len();
        if train.len() < target && !(last && test.is_empty()) {
            train.extend_from_slice(&members[g]);
        } else {
            test.extend_from_slice(&members[g]);
        }
    }
    train.sort_unstable();
    test.sort_unstable();
    Ok(Split { train, test })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn keys(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn split_is_seeded_sized_and_grouped() {
        let n = 200;
        // every third item duplicates its predecessor's content
        let ks: Vec<String> = (0..n)
            .map(|i| format!("h{}", i - usize::from(i % 3 == 2)))
            .collect();
        let a = split(n, &ks, 0.75, 7).unwrap();
        assert_eq!(a, split(n, &ks, 0.75, 7).unwrap());
        assert_ne!(a, split(n, &ks, 0.75, 8).unwrap());
        assert_eq!(a.train.len() + a.test.len(), n);
        assert!((149..=151).contains(&a.train.len()), "{}", a.train.len());
        for i in (2..n).step_by(3) {
            assert_eq!(
                a.train.contains(&i),
                a.train.contains(&(i - 1)),
                "group {i} straddles"
            );
        }
    }

    #[test]
    fn split_keeps_both_parts_non_empty_and_refuses_one_group() {
        let s = split(2, &keys(&["a", "b"]), 0.99, 1).unwrap();
        assert_eq!((s.train.len(), s.test.len()), (1, 1));
        let s = split(3, &keys(&["a", "a", "b"]), 0.5, 3).unwrap();
        assert!(!s.train.is_empty() && !s.test.is_empty());
        assert!(matches!(
            split(3, &keys(&["a", "a", "a"]), 0.5, 1),
            Err(EvalError::TooFewItems { groups: 1, .. })
        ));
        // empty keys are unknown content: each item is its own group
        assert!(split(3, &keys(&["", "", ""]), 0.5, 1).is_ok());
        assert!(matches!(
            split(3, &keys(&["a", "b", "c"]), 1.0, 1),
            Err(EvalError::BadFraction(_))
        ));
    }
}
