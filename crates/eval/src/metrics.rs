//! Ranking metrics. Every function is pure; scores are "higher = more likely".
//!
//! Ties are never broken by position (which would reward or punish a method
//! for the order pictures happen to be stored in): label-ranking metrics
//! follow scikit-learn's pessimistic convention, top-k metrics count the
//! expected hits under random tie-breaking, ROC AUC counts a tie as half a
//! correct pair, and average precision treats a tied block as one threshold.

use std::collections::BTreeMap;

use ndarray::{Array2, ArrayView2};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
pub use tagweave_suggest::ranking::{
    column_midranks, label_ranking_average_precision, mean, roc_auc,
};
use tagweave_suggest::ranking::{tied_blocks_desc, to_f64};

/// Queries (tags or tag pairs) need at least this many relevant test
/// pictures: with a single one, AP is just a reciprocal rank and very noisy.
pub const MIN_SEARCH_POSITIVES: usize = 2;

/// Expected membership of each entry in the top `k` when ties are broken
/// uniformly at random: 1 above the cut, 0 below, and for the tied block
/// straddling the cut (free slots / block size). Weights sum to `min(k, n)`.
pub fn top_k_weights<S: Copy + Into<f64>>(scores: &[S], k: usize) -> Vec<f64> {
    let scores = to_f64(scores);
    let mut weights = vec![0.0; scores.len()];
    let mut free = k;
    for block in tied_blocks_desc(&scores) {
        if free == 0 {
            break;
        }
        let taken = free.min(block.len());
        for &i in &block {
            weights[i] = taken as f64 / block.len() as f64;
        }
        free -= taken;
    }
    weights
}

/// Each column's scores replaced by mid-rank / rows, in (0, 1]: makes columns
/// of any method comparable ("how high is this picture among the others
/// for this tag"), whatever the scale of its scores.
pub(crate) fn column_ranks(scores: ArrayView2<f32>) -> Array2<f64> {
    column_midranks(scores) / scores.nrows() as f64
}

/// Coverage error of one picture (scikit-learn's definition): how far down
/// the ranking one must go to cover every relevant tag, counting every tag
/// that scores at least as high as the lowest-scored relevant one. 0 when
/// nothing is relevant; the best possible value is the number of relevant tags.
pub fn coverage_error<S: Copy + Into<f64>>(scores: &[S], relevant: &[bool]) -> f64 {
    let scores = to_f64(scores);
    let lowest = scores
        .iter()
        .zip(relevant)
        .filter(|(_, &r)| r)
        .map(|(&s, _)| s)
        .min_by(f64::total_cmp);
    lowest.map_or(0.0, |m| scores.iter().filter(|&&x| x >= m).count() as f64)
}

fn expected_hits<S: Copy + Into<f64>>(scores: &[S], relevant: &[bool], k: usize) -> f64 {
    top_k_weights(scores, k)
        .iter()
        .zip(relevant)
        .filter(|(_, &r)| r)
        .map(|(w, _)| w)
        .sum()
}

/// Precision at k: relevant tags among the k best-scored, divided by k
/// (ties at the cut counted as expected hits, see [`top_k_weights`]).
pub fn precision_at_k<S: Copy + Into<f64>>(scores: &[S], relevant: &[bool], k: usize) -> f64 {
    if k == 0 {
        return 0.0;
    }
    expected_hits(scores, relevant, k) / k as f64
}

/// Recall at k: relevant tags among the k best-scored, divided by the number
/// of relevant tags (0 when nothing is relevant).
pub fn recall_at_k<S: Copy + Into<f64>>(scores: &[S], relevant: &[bool], k: usize) -> f64 {
    let n_rel = relevant.iter().filter(|&&r| r).count();
    if n_rel == 0 {
        return 0.0;
    }
    expected_hits(scores, relevant, k) / n_rel as f64
}

/// Annotation quality per tag when each picture is given its `k` best tags.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AnnotationScores {
    /// Mean over tags of (correct suggestions / suggestions); 0 for a tag never suggested.
    pub precision: f64,
    /// Mean over tags of (correct suggestions / pictures carrying the tag).
    pub recall: f64,
    /// Number of tags suggested correctly at least once (recall > 0).
    pub n_plus: usize,
    /// Tags averaged over: those carried by at least one picture.
    pub tags: usize,
}

/// Per-tag precision and recall of top-`k` annotation, averaged over tags
/// that at least one picture carries; `None` when no picture carries a tag.
pub fn annotation_scores(
    scores: ArrayView2<f32>,
    truth: ArrayView2<bool>,
    k: usize,
) -> Option<AnnotationScores> {
    let n_tags = scores.ncols();
    let (mut suggested, mut correct, mut carried) =
        (vec![0.0; n_tags], vec![0.0; n_tags], vec![0usize; n_tags]);
    for (row, truth_row) in scores.outer_iter().zip(truth.outer_iter()) {
        let row: Vec<f32> = row.to_vec();
        for (t, w) in top_k_weights(&row, k).into_iter().enumerate() {
            suggested[t] += w;
            if truth_row[t] {
                correct[t] += w;
                carried[t] += 1;
            }
        }
    }
    let used: Vec<usize> = (0..n_tags).filter(|&t| carried[t] > 0).collect();
    let precision = mean(used.iter().map(|&t| {
        if suggested[t] > 0.0 {
            correct[t] / suggested[t]
        } else {
            0.0
        }
    }))?;
    let recall = mean(used.iter().map(|&t| correct[t] / carried[t] as f64))?;
    Some(AnnotationScores {
        precision,
        recall,
        n_plus: used.iter().filter(|&&t| correct[t] > 0.0).count(),
        tags: used.len(),
    })
}

/// Average precision of a ranking (Manning, Raghavan & Schütze, IIR §8.4):
/// the mean, over relevant items, of the precision of the ranking cut just
/// below each of them. Tied items form one cut (as in scikit-learn's
/// `average_precision_score`), so the result does not depend on their order.
/// `None` when nothing is relevant.
pub fn average_precision<S: Copy + Into<f64>>(scores: &[S], relevant: &[bool]) -> Option<f64> {
    let n_rel = relevant.iter().filter(|&&r| r).count();
    if n_rel == 0 {
        return None;
    }
    let (mut seen, mut hits, mut ap) = (0usize, 0usize, 0.0);
    for block in tied_blocks_desc(&to_f64(scores)) {
        let new_hits = block.iter().filter(|&&i| relevant[i]).count();
        seen += block.len();
        hits += new_hits;
        ap += new_hits as f64 / n_rel as f64 * hits as f64 / seen as f64;
    }
    Some(ap)
}

/// Mean average precision over a set of search queries.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SearchScore {
    pub map: f64,
    pub queries: usize,
}

/// Keyword search with one tag: for every tag carried by at least
/// [`MIN_SEARCH_POSITIVES`] pictures, rank the pictures by their score for
/// it and take AP; mean over those tags. `None` when no tag qualifies.
pub fn tag_search_map(scores: ArrayView2<f32>, truth: ArrayView2<bool>) -> Option<SearchScore> {
    let aps: Vec<f64> = (0..scores.ncols())
        .filter(|&t| truth.column(t).iter().filter(|&&r| r).count() >= MIN_SEARCH_POSITIVES)
        .filter_map(|t| average_precision(&scores.column(t).to_vec(), &truth.column(t).to_vec()))
        .collect();
    Some(SearchScore {
        map: mean(aps.iter().copied())?,
        queries: aps.len(),
    })
}

/// Seeded random sample of up to `max_pairs` tag pairs (a < b) that occur
/// together on at least [`MIN_SEARCH_POSITIVES`] pictures, ascending.
pub fn select_pairs(truth: ArrayView2<bool>, max_pairs: usize, seed: u64) -> Vec<(usize, usize)> {
    let mut together: BTreeMap<(usize, usize), usize> = BTreeMap::new();
    for row in truth.outer_iter() {
        let tags: Vec<usize> = (0..row.len()).filter(|&t| row[t]).collect();
        for (i, &a) in tags.iter().enumerate() {
            for &b in &tags[i + 1..] {
                *together.entry((a, b)).or_default() += 1;
            }
        }
    }
    let mut pairs: Vec<(usize, usize)> = together
        .into_iter()
        .filter(|&(_, n)| n >= MIN_SEARCH_POSITIVES)
        .map(|(p, _)| p)
        .collect();
    pairs.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    pairs.truncate(max_pairs);
    pairs.sort_unstable();
    pairs
}

/// Keyword search with two tags: relevant = pictures carrying both. The
/// query score is the product of the picture's per-tag column ranks (see
/// `column_ranks`), i.e. a sum of log-ranks: a soft AND that needs no
/// calibrated probabilities, so every method is combined the same way.
/// `None` when `pairs` is empty.
pub fn pair_search_map(
    scores: ArrayView2<f32>,
    truth: ArrayView2<bool>,
    pairs: &[(usize, usize)],
) -> Option<SearchScore> {
    let ranks = column_ranks(scores);
    let aps: Vec<f64> = pairs
        .iter()
        .filter_map(|&(a, b)| {
            let query: Vec<f64> = (0..scores.nrows())
                .map(|i| ranks[[i, a]] * ranks[[i, b]])
                .collect();
            let relevant: Vec<bool> = (0..scores.nrows())
                .map(|i| truth[[i, a]] && truth[[i, b]])
                .collect();
            average_precision(&query, &relevant)
        })
        .collect();
    Some(SearchScore {
        map: mean(aps.iter().copied())?,
        queries: aps.len(),
    })
}

/// Precision among the `count` highest scores (expected value under random
/// tie-breaking at the cut). With `count` = number of true positives this is
/// also the recall there ("R-precision"). `None` when `count` is 0.
pub fn precision_at_count(scores: &[f64], positive: &[bool], count: usize) -> Option<f64> {
    (count > 0).then(|| expected_hits(scores, positive, count) / count as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    fn close(a: f64, b: f64) {
        assert!((a - b).abs() < 1e-12, "{a} != {b}");
    }

    fn mask(row: &[u8]) -> Vec<bool> {
        row.iter().map(|&x| x == 1).collect()
    }

    fn mean_rows(truth: &[&[u8]], scores: &[&[f64]], f: fn(&[f64], &[bool]) -> f64) -> f64 {
        mean(truth.iter().zip(scores).map(|(t, s)| f(s, &mask(t)))).unwrap()
    }

    #[test]
    fn coverage_matches_scikit_learn_documentation() {
        // source: scikit-learn 1.9.1,
        //   coverage_error([[1,0,0],[0,1,1]], [[0.75,0.5,1],[1,0.2,0.1]]) = 2.5 (docstring example)
        let scores: [&[f64]; 2] = [&[0.75, 0.5, 1.0], &[1.0, 0.2, 0.1]];
        close(
            mean_rows(&[&[1, 0, 0], &[0, 1, 1]], &scores, coverage_error),
            2.5,
        );
    }

    #[test]
    fn coverage_with_ties_matches_scikit_learn() {
        // source: scikit-learn 1.9.1, y_true=[[1,0,1,0],[0,1,0,0],[1,1,0,1]],
        //   y_score=[[.5,.5,.2,.9],[.3,.3,.3,.1],[.1,.4,.4,.4]]:
        //   coverage_error = 3.6666666666666665 (rows 4, 3, 4)
        let truth: [&[u8]; 3] = [&[1, 0, 1, 0], &[0, 1, 0, 0], &[1, 1, 0, 1]];
        let scores: [&[f64]; 3] = [
            &[0.5, 0.5, 0.2, 0.9],
            &[0.3, 0.3, 0.3, 0.1],
            &[0.1, 0.4, 0.4, 0.4],
        ];
        close(
            mean_rows(&truth, &scores, coverage_error),
            3.6666666666666665,
        );
    }

    #[test]
    fn top_k_metrics_count_expected_hits_over_ties() {
        // worked by hand: order 1 | {0,2,3} tied | 4; k=2 leaves one slot for the tied
        // block of three, so each gets 1/3.
        let scores = [0.5f32, 0.9, 0.5, 0.5, 0.1];
        let w = top_k_weights(&scores, 2);
        close(w.iter().sum::<f64>(), 2.0);
        close(w[0], 1.0 / 3.0);
        assert_eq!((w[1], w[4]), (1.0, 0.0));
        let rel = mask(&[0, 1, 0, 1, 1]);
        close(precision_at_k(&scores, &rel, 2), (1.0 + 1.0 / 3.0) / 2.0);
        close(recall_at_k(&scores, &rel, 2), (1.0 + 1.0 / 3.0) / 3.0);
        close(precision_at_k(&scores, &rel, 1), 1.0);
        close(recall_at_k(&scores, &rel, 5), 1.0);
        close(precision_at_k(&scores, &rel, 5), 3.0 / 5.0);
    }

    #[test]
    fn annotation_scores_worked_example() {
        // worked by hand, k=1: picture 0 → tag 0 (correct), picture 1 → tag 1 (wrong),
        // picture 2 → tag 0 (wrong). tag 0: P 1/2, R 1/2; tag 1: P 0, R 0; tag 2 never
        // suggested: P 0, R 0. Means 1/6, N+ = 1.
        let scores = array![[0.9f32, 0.1, 0.0], [0.2, 0.8, 0.1], [0.7, 0.3, 0.0]];
        let truth = array![
            [true, false, false],
            [true, false, false],
            [false, true, true]
        ];
        let a = annotation_scores(scores.view(), truth.view(), 1).unwrap();
        close(a.precision, 1.0 / 6.0);
        close(a.recall, 1.0 / 6.0);
        assert_eq!((a.n_plus, a.tags), (1, 3));
    }

    /// The ranked list of IIR exercise 8.8 (from memory): R R N N N N N N R N R N N N R N N N N R,
    /// 8 relevant documents in a collection of 10,000; returns a full ranking of the collection
    /// with the 2 unretrieved relevant documents at the given ranks (1-based).
    fn iir_ranking(missing_at: [usize; 2]) -> (Vec<f64>, Vec<bool>) {
        let top = "RRNNNNNNRNRNNNRNNNNR";
        let mut rel = vec![false; 10_000];
        for (i, c) in top.chars().enumerate() {
            rel[i] = c == 'R';
        }
        for r in missing_at {
            rel[r - 1] = true;
        }
        let scores = (0..10_000).map(|i| -(i as f64)).collect();
        (scores, rel)
    }

    #[test]
    fn average_precision_matches_iir_exercise() {
        // source: Manning, Raghavan & Schütze, Introduction to Information Retrieval (2008),
        // §8.4 and exercise 8.8 (from memory). Precision at the six retrieved relevant ranks
        // 1, 2, 9, 11, 15, 20 is 1, 1, 3/9, 4/11, 5/15, 6/20. Largest possible MAP (the other two
        // relevant at ranks 21, 22): (… + 7/21 + 8/22)/8 = 0.50341; smallest (ranks 9999, 10000):
        // (… + 7/9999 + 8/10000)/8 = 0.41648. Cross-checked with scikit-learn 1.9.1
        // average_precision_score on the same 10,000-item rankings: 0.5034090909090909 and
        // 0.41647538753875385.
        let (s, r) = iir_ranking([21, 22]);
        close(average_precision(&s, &r).unwrap(), 0.5034090909090909);
        let (s, r) = iir_ranking([9_999, 10_000]);
        close(average_precision(&s, &r).unwrap(), 0.41647538753875385);
        let six = 1.0 + 1.0 + 3.0 / 9.0 + 4.0 / 11.0 + 5.0 / 15.0 + 6.0 / 20.0;
        close(
            average_precision(&s, &r).unwrap(),
            (six + 7.0 / 9_999.0 + 8.0 / 10_000.0) / 8.0,
        );
    }

    #[test]
    fn average_precision_with_ties_matches_scikit_learn() {
        // source: scikit-learn 1.9.1 average_precision_score([1,0,1,0,1,0],
        //   [0.9,0.9,0.5,0.5,0.5,0.1]) = 0.5666666666666667; all tied:
        //   average_precision_score([1,0,1,0,0],[1,1,1,1,1]) = 0.4 (= prevalence)
        close(
            average_precision(&[0.9, 0.9, 0.5, 0.5, 0.5, 0.1], &mask(&[1, 0, 1, 0, 1, 0])).unwrap(),
            0.5666666666666667,
        );
        close(
            average_precision(&[1.0; 5], &mask(&[1, 0, 1, 0, 0])).unwrap(),
            0.4,
        );
        assert_eq!(average_precision(&[1.0, 2.0], &[false, false]), None);
    }

    #[test]
    fn tag_search_uses_tags_with_two_positives() {
        // tag 0 has 2 positives (ranked 1st and 3rd: AP (1 + 2/3)/2), tag 1 only one: skipped
        let scores = array![[0.9f32, 0.1], [0.5, 0.2], [0.4, 0.3]];
        let truth = array![[true, false], [false, true], [true, false]];
        let s = tag_search_map(scores.view(), truth.view()).unwrap();
        assert_eq!(s.queries, 1);
        close(s.map, (1.0 + 2.0 / 3.0) / 2.0);
    }

    #[test]
    fn pair_search_ranks_by_product_of_column_ranks() {
        // worked by hand: column ranks / 4: tag 0 → [1, .75, .25, .5], tag 1 → [.5, 1, .75, .25];
        // products [.5, .75, .1875, .125]; relevant pictures 1 and 2 sit at ranks 1 and 3.
        let scores = array![[0.9f32, 0.2], [0.8, 0.9], [0.1, 0.8], [0.5, 0.1]];
        let truth = array![[true, false], [true, true], [true, true], [false, false]];
        let s = pair_search_map(scores.view(), truth.view(), &[(0, 1)]).unwrap();
        close(s.map, (1.0 + 2.0 / 3.0) / 2.0);
        assert_eq!(pair_search_map(scores.view(), truth.view(), &[]), None);
    }

    #[test]
    fn pairs_need_two_joint_pictures_and_are_capped() {
        let truth = array![
            [true, true, true, false],
            [true, true, false, false],
            [true, false, true, true],
            [false, false, true, true]
        ];
        // joint counts: (0,1)=2, (0,2)=2, (2,3)=2, (0,3)=1, (1,2)=1
        assert_eq!(
            select_pairs(truth.view(), 10, 1),
            vec![(0, 1), (0, 2), (2, 3)]
        );
        let two = select_pairs(truth.view(), 2, 1);
        assert_eq!(two.len(), 2);
        assert_eq!(two, select_pairs(truth.view(), 2, 1));
    }

    #[test]
    fn precision_at_count_splits_tied_cut() {
        // worked by hand: top 3 = {0, 2} (tied, both taken) + 3 → 2 noisy of 3;
        // top 1 = half of 0 and half of 2 → 0.5 expected hits.
        let d = [0.9, 0.2, 0.9, 0.4];
        let noisy = mask(&[1, 0, 0, 1]);
        close(precision_at_count(&d, &noisy, 3).unwrap(), 2.0 / 3.0);
        close(precision_at_count(&d, &noisy, 1).unwrap(), 0.5);
        assert_eq!(precision_at_count(&d, &noisy, 0), None);
    }
}
