//! Ranks and the ranking measure the suggester chooses its settings by. Every function is
//! pure; scores are "higher = more likely", and ties are never broken by position.

use ndarray::{Array2, ArrayView2};

/// Scores of any numeric type as `f64`.
pub fn to_f64<S: Copy + Into<f64>>(scores: &[S]) -> Vec<f64> {
    scores.iter().map(|&s| s.into()).collect()
}

/// Indices by descending score, then grouped into blocks of equal score.
pub fn tied_blocks_desc(scores: &[f64]) -> Vec<Vec<usize>> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    order
        .chunk_by(|&a, &b| scores[a] == scores[b])
        .map(<[usize]>::to_vec)
        .collect()
}

/// Mid-ranks in ascending order (1 = smallest; tied values share the mean
/// of the ranks they span).
pub fn midranks(values: &[f64]) -> Vec<f64> {
    let mut ranks = vec![0.0; values.len()];
    let mut above = values.len();
    for block in tied_blocks_desc(values) {
        let mid = (above - block.len() + 1 + above) as f64 / 2.0;
        for &i in &block {
            ranks[i] = mid;
        }
        above -= block.len();
    }
    ranks
}

/// Each column's scores replaced by their mid-ranks (1 = lowest).
pub fn column_midranks(scores: ArrayView2<f32>) -> Array2<f64> {
    let mut out = Array2::zeros(scores.raw_dim());
    for (col, mut dest) in scores.columns().into_iter().zip(out.columns_mut()) {
        let values: Vec<f64> = col.iter().map(|&v| f64::from(v)).collect();
        dest.iter_mut()
            .zip(midranks(&values))
            .for_each(|(d, r)| *d = r);
    }
    out
}

/// Arithmetic mean; `None` for no values.
pub fn mean(values: impl IntoIterator<Item = f64>) -> Option<f64> {
    let (sum, count) = values
        .into_iter()
        .fold((0.0, 0usize), |(s, c), v| (s + v, c + 1));
    (count > 0).then(|| sum / count as f64)
}

/// Label-ranking average precision of one picture (scikit-learn's
/// definition): for each relevant tag j with rank_j = |{tags scoring ≥ s_j}|,
/// take |{relevant tags scoring ≥ s_j}| / rank_j; average over relevant tags.
/// A picture whose tags are all relevant or all irrelevant scores 1.
pub fn label_ranking_average_precision<S: Copy + Into<f64>>(
    scores: &[S],
    relevant: &[bool],
) -> f64 {
    let scores = to_f64(scores);
    let n_rel = relevant.iter().filter(|&&r| r).count();
    if n_rel == 0 || n_rel == scores.len() {
        return 1.0;
    }
    let mut total = 0.0;
    for (&s, _) in scores.iter().zip(relevant).filter(|(_, &r)| r) {
        let rank = scores.iter().filter(|&&x| x >= s).count();
        let rel_rank = scores
            .iter()
            .zip(relevant)
            .filter(|(&x, &r)| r && x >= s)
            .count();
        total += rel_rank as f64 / rank as f64;
    }
    total / n_rel as f64
}

/// Area under the ROC curve: the fraction of (positive, negative) pairs in
/// which the positive scores higher, a tie counting one half (Mann–Whitney
/// U / (P·N), computed from mid-ranks). `None` without both classes.
pub fn roc_auc(scores: &[f64], positive: &[bool]) -> Option<f64> {
    let p = positive.iter().filter(|&&x| x).count();
    let n = positive.len() - p;
    if p == 0 || n == 0 {
        return None;
    }
    let rank_sum: f64 = midranks(scores)
        .iter()
        .zip(positive)
        .filter(|(_, &x)| x)
        .map(|(r, _)| r)
        .sum();
    Some((rank_sum - (p * (p + 1)) as f64 / 2.0) / (p * n) as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(a: f64, b: f64) {
        assert!((a - b).abs() < 1e-12, "{a} != {b}");
    }

    fn mask(row: &[u8]) -> Vec<bool> {
        row.iter().map(|&x| x == 1).collect()
    }

    fn mean_lrap(truth: &[&[u8]], scores: &[&[f64]]) -> f64 {
        mean(
            truth
                .iter()
                .zip(scores)
                .map(|(t, s)| label_ranking_average_precision(s, &mask(t))),
        )
        .unwrap()
    }

    #[test]
    fn lrap_matches_scikit_learn_documentation() {
        // source: scikit-learn 1.9.1,
        //   label_ranking_average_precision_score([[1,0,0],[0,0,1]], [[0.75,0.5,1],[1,0.2,0.1]])
        //   = 0.41666666666666663 (also the docstring example)
        let scores: [&[f64]; 2] = [&[0.75, 0.5, 1.0], &[1.0, 0.2, 0.1]];
        close(
            mean_lrap(&[&[1, 0, 0], &[0, 0, 1]], &scores),
            0.41666666666666663,
        );
    }

    #[test]
    fn lrap_with_ties_matches_scikit_learn() {
        // source: scikit-learn 1.9.1, y_true=[[1,0,1,0],[0,1,0,0],[1,1,0,1]],
        //   y_score=[[.5,.5,.2,.9],[.3,.3,.3,.1],[.1,.4,.4,.4]]:
        //   label_ranking_average_precision_score = 0.4814814814814814 (rows: 0.41666666666666663,
        //   0.3333333333333333, 0.6944444444444443)
        let truth: [&[u8]; 3] = [&[1, 0, 1, 0], &[0, 1, 0, 0], &[1, 1, 0, 1]];
        let scores: [&[f64]; 3] = [
            &[0.5, 0.5, 0.2, 0.9],
            &[0.3, 0.3, 0.3, 0.1],
            &[0.1, 0.4, 0.4, 0.4],
        ];
        let lraps = [0.41666666666666663, 0.3333333333333333, 0.6944444444444443];
        for ((t, s), want) in truth.iter().zip(&scores).zip(lraps) {
            assert!((label_ranking_average_precision(s, &mask(t)) - want).abs() < 1e-12);
        }
        close(mean_lrap(&truth, &scores), 0.4814814814814814);
    }

    #[test]
    fn lrap_edge_cases_follow_scikit_learn() {
        // source: scikit-learn convention (label_ranking_average_precision_score docs): a sample
        // with no relevant or only relevant labels scores 1.
        assert_eq!(
            label_ranking_average_precision(&[0.1f32, 0.2], &[false, false]),
            1.0
        );
        assert_eq!(
            label_ranking_average_precision(&[0.1f32, 0.2], &[true, true]),
            1.0
        );
        assert_eq!(
            label_ranking_average_precision(&[0.1f32, 0.2], &[true, false]),
            0.5
        );
    }

    #[test]
    fn midranks_average_ties() {
        assert_eq!(midranks(&[0.3, 0.1, 0.3, 0.2]), vec![3.5, 1.0, 3.5, 2.0]);
    }

    // worked by hand: column 0 [0.9, 0.2, 0.9] → ranks [2.5, 1, 2.5]; column 1 [1, 2, 3] → [1, 2, 3].
    #[test]
    fn column_midranks_rank_each_column_on_its_own() {
        let scores = ndarray::array![[0.9f32, 1.0], [0.2, 2.0], [0.9, 3.0]];
        assert_eq!(
            column_midranks(scores.view()),
            ndarray::array![[2.5, 1.0], [1.0, 2.0], [2.5, 3.0]]
        );
    }

    #[test]
    fn roc_auc_counts_ties_half() {
        // worked by hand: positives score 0.5, 0.9, 0.2; negatives 0.2, 0.5, 0.1.
        //   0.5 vs (0.2, 0.5, 0.1) → 1 + ½ + 1 = 2.5;  0.9 → 3;  0.2 → ½ + 0 + 1 = 1.5
        //   AUC = 7 / 9 = 0.7777…
        // source: cross-checked with scikit-learn 1.9.1
        //   roc_auc_score([0,1,0,1,1,0], [0.2,0.5,0.5,0.9,0.2,0.1]) = 0.7777777777777778;
        //   roc_auc_score([0,0,1,1], [0.1,0.4,0.35,0.8]) = 0.75 (docs example)
        let auc = roc_auc(
            &[0.2, 0.5, 0.5, 0.9, 0.2, 0.1],
            &[false, true, false, true, true, false],
        )
        .unwrap();
        close(auc, 7.0 / 9.0);
        close(
            roc_auc(&[0.1, 0.4, 0.35, 0.8], &[false, false, true, true]).unwrap(),
            0.75,
        );
        assert_eq!(roc_auc(&[0.3, 0.4], &[true, true]), None);
    }
}
