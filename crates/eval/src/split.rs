//! Train/test split grouped by content, the train-only vocabulary and the
//! train-only feature standardisation.

use std::collections::{BTreeSet, HashMap};

use ndarray::{Array1, Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::EvalError;

/// Indices of train and test pictures, each list ascending.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Split {
    pub train: Vec<usize>,
    pub test: Vec<usize>,
}

/// Group id per item: items sharing a non-empty content key share a group
/// (exact duplicates must land on the same side, or the test part leaks);
/// an empty key means "unknown" and makes the item its own group. Ids are
/// numbered in order of first appearance so they do not depend on hashing.
pub fn group_ids(content_keys: &[String]) -> Vec<usize> {
    let mut seen: HashMap<&str, usize> = HashMap::new();
    let mut next = 0;
    let mut ids = Vec::with_capacity(content_keys.len());
    for key in content_keys {
        let id = match seen.get(key.as_str()) {
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

/// Tag names known to the methods, sorted, each with its column index.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Vocabulary {
    tags: Vec<String>,
    index: HashMap<String, usize>,
}

impl Vocabulary {
    /// Every distinct tag of the given items (pass train items only).
    pub fn from_items<'a>(items: impl IntoIterator<Item = &'a [String]>) -> Self {
        let set: BTreeSet<&String> = items.into_iter().flatten().collect();
        let tags: Vec<String> = set.into_iter().cloned().collect();
        let index = tags
            .iter()
            .enumerate()
            .map(|(i, t)| (t.clone(), i))
            .collect();
        Vocabulary { tags, index }
    }

    pub fn len(&self) -> usize {
        self.tags.len()
    }

    pub fn is_empty(&self) -> bool {
        self.tags.is_empty()
    }

    pub fn tags(&self) -> &[String] {
        &self.tags
    }

    pub fn index_of(&self, tag: &str) -> Option<usize> {
        self.index.get(tag).copied()
    }

    /// Known tags as sorted, de-duplicated column indices; unknown tags are dropped.
    pub fn encode(&self, tags: &[String]) -> Vec<usize> {
        let set: BTreeSet<usize> = tags.iter().filter_map(|t| self.index_of(t)).collect();
        set.into_iter().collect()
    }
}

/// Per-dimension standardisation learned from train rows only, so test
/// pictures never influence the features the methods see. Kept with a trained
/// model, so new pictures are scaled exactly as its training pictures were.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Standardiser {
    mean: Array1<f32>,
    scale: Array1<f32>,
}

/// A dimension's scale never drops below this fraction of the mean standard
/// deviation: a dimension (nearly) constant on train would otherwise blow up
/// tiny test deviations into huge values.
const STD_FLOOR_RELATIVE: f64 = 0.01;

impl Standardiser {
    /// Mean and population standard deviation per column (computed in f64).
    pub fn fit(rows: ArrayView2<f32>) -> Self {
        let n = rows.nrows().max(1) as f64;
        let cols = rows.ncols();
        let mut mean = vec![0.0f64; cols];
        for row in rows.outer_iter() {
            for (m, &v) in mean.iter_mut().zip(row) {
                *m += f64::from(v);
            }
        }
        mean.iter_mut().for_each(|m| *m /= n);
        let mut var = vec![0.0f64; cols];
        for row in rows.outer_iter() {
            for ((s, &v), m) in var.iter_mut().zip(row).zip(&mean) {
                *s += (f64::from(v) - m).powi(2);
            }
        }
        let std: Vec<f64> = var.iter().map(|s| (s / n).sqrt()).collect();
        let mean_std = std.iter().sum::<f64>() / cols.max(1) as f64;
        let floor = if mean_std > 0.0 {
            STD_FLOOR_RELATIVE * mean_std
        } else {
            1.0
        };
        Standardiser {
            mean: mean.iter().map(|&m| m as f32).collect(),
            scale: std.iter().map(|&s| s.max(floor) as f32).collect(),
        }
    }

    /// Number of feature columns it was fitted on.
    pub fn width(&self) -> usize {
        self.mean.len()
    }

    /// `(x - mean) / scale`, column by column.
    pub fn apply(&self, rows: ArrayView2<f32>) -> Array2<f32> {
        let mut out = rows.to_owned();
        out -= &self.mean.view().insert_axis(Axis(0));
        out /= &self.scale.view().insert_axis(Axis(0));
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

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

    #[test]
    fn vocabulary_is_sorted_and_drops_unknown() {
        let items = [keys(&["sea", "boat"]), keys(&["boat", "dusk"])];
        let v = Vocabulary::from_items(items.iter().map(|t| t.as_slice()));
        assert_eq!(v.tags(), &keys(&["boat", "dusk", "sea"])[..]);
        assert_eq!(v.encode(&keys(&["sea", "fog", "boat", "sea"])), vec![0, 2]);
    }

    #[test]
    fn standardiser_uses_train_statistics_and_floors_constant_dims() {
        let train = array![[1.0f32, 5.0, 0.0], [3.0, 5.0, 10.0]];
        let s = Standardiser::fit(train.view());
        let z = s.apply(train.view());
        assert_eq!(z, array![[-1.0f32, 0.0, -1.0], [1.0, 0.0, 1.0]]);
        // constant column: scale floored at 1% of mean std (mean std = (1+0+5)/3 = 2)
        let t = s.apply(array![[2.0f32, 5.02, 5.0]].view());
        assert!((t[[0, 1]] - 1.0).abs() < 1e-3, "{t}");
    }
}
