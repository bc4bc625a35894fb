//! Tag completion: a picture carries some tags already and the others are to be ranked.
//! What the suggester needs for it: which tags a validation picture reveals, how well
//! the rest are ranked, tag co-occurrence, and the weighted mix of several sources.

use ndarray::{Array1, Array2, ArrayView2};
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};

use crate::ranking::{label_ranking_average_precision, mean};
use crate::train_set::grouped_folds;
use crate::TrainSet;

/// One fold in this many of the train pictures (content groups kept whole) chooses
/// the fine-tuning length, the blends and the calibrations: about 14 %.
pub(crate) const VALIDATION_FOLDS: usize = 7;

/// Offset deriving the suggester's reveal of its validation fold from the fit seed.
pub(crate) const VALIDATION_REVEAL_SEED: u64 = 0x7265_7661;

/// Which tags of each picture are shown and which are to be found (sorted lists).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reveal {
    pub revealed: Vec<Vec<usize>>,
    pub hidden: Vec<Vec<usize>>,
}

/// For each list of two or more tags, ⌊n/2⌋ of them revealed (chosen by `seed`), the
/// rest hidden; lists of fewer tags are left out. Returns the kept positions too.
pub fn reveal_half(lists: &[Vec<usize>], seed: u64) -> (Vec<usize>, Reveal) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut kept = Vec::new();
    let mut reveal = Reveal {
        revealed: Vec::new(),
        hidden: Vec::new(),
    };
    for (i, list) in lists.iter().enumerate() {
        if list.len() < 2 {
            continue;
        }
        let mut shown = list.clone();
        shown.shuffle(&mut rng);
        let mut hidden = shown.split_off(list.len() / 2);
        shown.sort_unstable();
        hidden.sort_unstable();
        kept.push(i);
        reveal.revealed.push(shown);
        reveal.hidden.push(hidden);
    }
    (kept, reveal)
}

/// The first grouped validation fold of `train`: (fit rows, validation rows).
/// `None` when the train pictures are too few to hold a fold out.
pub fn validation_fold(train: &TrainSet) -> Option<(Vec<usize>, Vec<usize>)> {
    let val = grouped_folds(train.groups, VALIDATION_FOLDS, train.seed)
        .into_iter()
        .next()?;
    let fit = (0..train.tags.len())
        .filter(|i| val.binary_search(i).is_err())
        .collect();
    Some((fit, val))
}

/// Of the validation rows `val`, those with two or more tags, each revealing ⌊n/2⌋
/// of them (drawn with `train.seed ^ stream`); `None` when no validation picture has
/// two tags.
pub fn validation_reveal(
    train: &TrainSet,
    val: &[usize],
    stream: u64,
) -> Option<(Vec<usize>, Reveal)> {
    let lists: Vec<Vec<usize>> = val.iter().map(|&i| train.tags[i].clone()).collect();
    let (kept, reveal) = reveal_half(&lists, train.seed ^ stream);
    (!kept.is_empty()).then(|| (kept.iter().map(|&k| val[k]).collect(), reveal))
}

/// Per picture: the scores and truth of the tags it does not reveal.
pub fn unrevealed(scores: ArrayView2<f32>, reveal: &Reveal) -> Vec<(Vec<f32>, Vec<bool>)> {
    scores
        .outer_iter()
        .zip(reveal.revealed.iter().zip(&reveal.hidden))
        .map(|(row, (shown, hidden))| {
            (0..row.len())
                .filter(|j| shown.binary_search(j).is_err())
                .map(|j| (row[j], hidden.binary_search(&j).is_ok()))
                .unzip()
        })
        .collect()
}

/// Mean LRAP over pictures of their hidden tags, the revealed ones left out of the
/// ranking.
pub fn completion_lrap(scores: ArrayView2<f32>, reveal: &Reveal) -> f64 {
    mean(
        unrevealed(scores, reveal)
            .iter()
            .map(|(s, t)| label_ranking_average_precision(s, t)),
    )
    .unwrap_or(0.0)
}

/// Σ weightᵢ · sourceᵢ (sources of one shape). The sources are on one scale already,
/// estimates of how likely each tag is; blending their ranks instead ranked worse
/// (BENCHMARKS.md, "tag completion").
pub fn mix(sources: &[ArrayView2<f32>], weights: &[f32]) -> Array2<f32> {
    let mut out = Array2::zeros(sources.first().map_or((0, 0), |s| s.dim()));
    for (source, &w) in sources.iter().zip(weights) {
        out.scaled_add(w, source);
    }
    out
}

/// Every way to give `n` sources weights in quarters that sum to 1, the first
/// source's largest weight first.
pub fn weight_grid(n: usize) -> Vec<Vec<f32>> {
    fn parts(total: usize, n: usize) -> Vec<Vec<usize>> {
        if n <= 1 {
            return vec![vec![total]];
        }
        (0..=total)
            .rev()
            .flat_map(|first| {
                parts(total - first, n - 1)
                    .into_iter()
                    .map(move |mut rest| {
                        rest.insert(0, first);
                        rest
                    })
            })
            .collect()
    }
    parts(4, n)
        .into_iter()
        .map(|p| p.into_iter().map(|q| q as f32 / 4.0).collect())
        .collect()
}

/// The weights of `grid` whose mix of `sources` scores best by `score` (the first on
/// ties).
pub fn best_weights(
    grid: &[Vec<f32>],
    sources: &[ArrayView2<f32>],
    score: impl Fn(ArrayView2<f32>) -> f64,
) -> Vec<f32> {
    let scores: Vec<f64> = grid.iter().map(|w| score(mix(sources, w).view())).collect();
    let best = (0..scores.len()).fold(0, |b, i| if scores[i] > scores[b] { i } else { b });
    grid.get(best).cloned().unwrap_or_default()
}

/// Tag co-occurrence: a tag scores the mean, over the tags r a picture carries, of the
/// share of train pictures carrying r that also carry it, smoothed toward the tag's
/// frequency by one pseudo-picture. Without carried tags it is the frequency.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TagCooccurrence {
    /// `together[[r, t]]`: train pictures carrying both r and t.
    together: Array2<f32>,
    /// Train pictures carrying each tag.
    carrying: Array1<f32>,
    frequency: Array1<f32>,
}

impl TagCooccurrence {
    pub fn count(tags: &[Vec<usize>], n_tags: usize) -> Self {
        let counts = TagCounts::count(tags, n_tags);
        let frequency = counts.carrying.mapv(|c| c / counts.pictures.max(1.0));
        TagCooccurrence {
            together: counts.together,
            carrying: counts.carrying,
            frequency,
        }
    }

    /// Scores (pictures × tag columns) from the tags each picture carries; tag indices
    /// beyond the counted columns are ignored.
    pub fn score(&self, carried: &[Vec<usize>]) -> Array2<f32> {
        let n_tags = self.frequency.len();
        let mut out = Array2::zeros((carried.len(), n_tags));
        for (tags, mut row) in carried.iter().zip(out.outer_iter_mut()) {
            let known: Vec<usize> = tags.iter().copied().filter(|&r| r < n_tags).collect();
            if known.is_empty() {
                row.assign(&self.frequency);
                continue;
            }
            for (t, cell) in row.iter_mut().enumerate() {
                let shares = known.iter().map(|&r| {
                    smoothed_share(self.together[[r, t]], self.carrying[r], self.frequency[t])
                });
                *cell = shares.sum::<f32>() / known.len() as f32;
            }
        }
        out
    }
}

/// The co-occurrence share of a tag given one carried tag r: pictures carrying both,
/// plus the tag's frequency as one pseudo-picture, over pictures carrying r plus one.
fn smoothed_share(together: f32, carrying_r: f32, frequency: f32) -> f32 {
    (together + frequency) / (carrying_r + 1.0)
}

/// Tag counts over a collection's tagged pictures, so that each picture's tags can be
/// judged by the other pictures' (its own row taken out): the review queue's
/// co-occurrence evidence, honest although every picture was counted.
#[derive(Debug, Clone, PartialEq)]
pub struct TagCounts {
    together: Array2<f32>,
    carrying: Array1<f32>,
    pictures: f32,
}

impl TagCounts {
    pub fn count<L: AsRef<[usize]>>(tags: &[L], n_tags: usize) -> Self {
        let mut together = Array2::zeros((n_tags, n_tags));
        let mut carrying = Array1::zeros(n_tags);
        for list in tags {
            let list = list.as_ref();
            for &r in list {
                carrying[r] += 1.0;
                list.iter().for_each(|&t| together[[r, t]] += 1.0);
            }
        }
        TagCounts {
            together,
            carrying,
            pictures: tags.len() as f32,
        }
    }

    /// For each tag t of `list` (distinct columns): the smallest of its smoothed shares
    /// given each of the list's other tags (as in [`TagCooccurrence`], which takes their
    /// mean), counted without `own` — the counted list of the picture being judged (empty
    /// when it was not counted). The smallest, because one wrong tag shows as a pair that
    /// hardly ever comes together ("summer" beside "winter"), and a mean over the common
    /// tags beside it would hide that. Alone, a tag gets its frequency.
    pub fn support_without(&self, list: &[usize], own: &[usize]) -> Vec<f32> {
        let counted = |c: usize| own.contains(&c) as u8 as f32;
        let pictures = self.pictures - (!own.is_empty()) as u8 as f32;
        list.iter()
            .map(|&t| {
                let frequency = (self.carrying[t] - counted(t)) / pictures.max(1.0);
                let given: Vec<usize> = list.iter().copied().filter(|&r| r != t).collect();
                if given.is_empty() {
                    return frequency;
                }
                let shares = given.iter().map(|&r| {
                    smoothed_share(
                        self.together[[r, t]] - counted(r) * counted(t),
                        self.carrying[r] - counted(r),
                        frequency,
                    )
                });
                shares.fold(f32::INFINITY, f32::min)
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Worked by hand. Train pictures: {0,1}, {0,1}, {0,2}, {2}; n = 4.
    // carrying = [3, 2, 2]; frequency = [0.75, 0.5, 0.5]; together row 0 = [3, 2, 1].
    // Carried {0}: (together[0] + frequency) / (carrying[0] + 1) = [3.75, 2.5, 1.5] / 4
    // = [0.9375, 0.625, 0.375]. Carried {0, 2}: row 2 = ([1, 0, 2] + frequency) / 3 =
    // [0.5833, 0.1667, 0.8333]; mean with row 0 = [0.7604, 0.3958, 0.6042].
    #[test]
    fn cooccurrence_matches_a_hand_worked_example() {
        let c = TagCooccurrence::count(&[vec![0, 1], vec![0, 1], vec![0, 2], vec![2]], 3);
        let got = c.score(&[vec![0], vec![0, 2], vec![]]);
        let want = [
            [0.9375, 0.625, 0.375],
            [0.760_416_7, 0.395_833_3, 0.604_166_7],
            [0.75, 0.5, 0.5],
        ];
        for (g, w) in got.outer_iter().zip(want) {
            assert!(g.iter().zip(w).all(|(a, b)| (a - b).abs() < 1e-5), "{got}");
        }
        // a tag index the counts never saw is ignored, not a panic
        assert_eq!(c.score(&[vec![7]]).row(0), c.frequency.view());
    }

    // Worked by hand. Pictures {0,1}, {0,1}, {0,2}, {2}; judging the first with its own
    // row taken out leaves {0,1}, {0,2}, {2}: n = 3, carrying = [2, 1, 2], together[0][1] = 1,
    // together[1][0] = 1. Tag 0 given 1: frequency 2/3, (1 + 2/3) / (1 + 1) = 0.8333.
    // Tag 1 given 0: frequency 1/3, (1 + 1/3) / (2 + 1) = 0.4444.
    // A list not counted ({1, 2}, own empty): n = 4, carrying = [3, 2, 2]; tag 1 given 2:
    // frequency 2/4, (0 + 0.5) / (2 + 1) = 0.1667; tag 2 given 1: (0 + 0.5) / (2 + 1).
    // Alone ({2} judged without its own row): frequency of 2 among the 3 others = 1/3.
    // Two others ({0, 1, 2}, not counted): tag 0 given 1 = (2 + 0.75) / 3 = 0.9167, given
    // 2 = (1 + 0.75) / 3 = 0.5833; the smaller is its support.
    #[test]
    fn support_without_a_picture_matches_a_hand_worked_example() {
        let lists = [vec![0, 1], vec![0, 1], vec![0, 2], vec![2]];
        let counts = TagCounts::count(&lists, 3);
        let close = |got: Vec<f32>, want: &[f32]| {
            assert!(
                got.iter().zip(want).all(|(a, b)| (a - b).abs() < 1e-5),
                "{got:?} != {want:?}"
            );
        };
        close(
            counts.support_without(&[0, 1], &[0, 1]),
            &[0.833_333_3, 0.444_444_4],
        );
        close(
            counts.support_without(&[1, 2], &[]),
            &[0.166_666_7, 0.166_666_7],
        );
        close(counts.support_without(&[2], &[2]), &[0.333_333_3]);
        close(
            counts.support_without(&[0, 1, 2], &[])[..1].to_vec(),
            &[0.583_333_3],
        );
        // with nothing taken out it agrees with the co-occurrence score
        let whole = TagCooccurrence::count(&lists, 3).score(&[vec![1]]);
        close(
            counts.support_without(&[1, 2], &[])[1..].to_vec(),
            &[whole[[0, 2]]],
        );
    }

    // By hand: 0.25 · [0.8, 0.2] + 0.75 · [0.4, 0.6] = [0.5, 0.5].
    #[test]
    fn mix_weighs_each_source() {
        let a = ndarray::array![[0.8f32, 0.2]];
        let b = ndarray::array![[0.4f32, 0.6]];
        let got = mix(&[a.view(), b.view()], &[0.25, 0.75]);
        assert!(got.iter().all(|g| (g - 0.5).abs() < 1e-6), "{got}");
    }

    #[test]
    fn weight_grid_sums_to_one_in_quarters() {
        assert_eq!(weight_grid(2)[0], vec![1.0, 0.0]);
        assert_eq!(weight_grid(2).len(), 5);
        // compositions of 4 into 3 parts: C(6, 2) = 15
        let three = weight_grid(3);
        assert_eq!(three.len(), 15);
        assert!(three
            .iter()
            .all(|w| (w.iter().sum::<f32>() - 1.0).abs() < 1e-6));
    }

    #[test]
    fn reveal_half_shows_the_floor_of_half_and_skips_single_tags() {
        let lists = vec![vec![0, 1, 2, 3, 4], vec![5], vec![1, 2]];
        let (kept, reveal) = reveal_half(&lists, 7);
        assert_eq!(kept, vec![0, 2]);
        assert_eq!((reveal.revealed[0].len(), reveal.hidden[0].len()), (2, 3));
        assert_eq!((reveal.revealed[1].len(), reveal.hidden[1].len()), (1, 1));
        let mut all = [reveal.revealed[0].clone(), reveal.hidden[0].clone()].concat();
        all.sort_unstable();
        assert_eq!(all, lists[0]);
        assert_eq!(reveal_half(&lists, 7).1, reveal);
    }

    // source: scikit-learn 1.9.1 `label_ranking_average_precision_score` on each row
    // with its revealed column removed: ([[0, 1, 1]], [[0.9, 0.2, 0.5]]) → 0.58333 and
    // ([[0, 1, 0]], [[0.1, 0.7, 0.3]]) → 1.0.
    #[test]
    fn completion_lrap_ranks_only_the_unrevealed_tags() {
        let scores = ndarray::array![[5.0f32, 0.9, 0.2, 0.5], [0.1, 9.0, 0.7, 0.3]];
        let reveal = Reveal {
            revealed: vec![vec![0], vec![1]],
            hidden: vec![vec![2, 3], vec![2]],
        };
        let got = completion_lrap(scores.view(), &reveal);
        assert!((got - (0.583_333_3 + 1.0) / 2.0).abs() < 1e-6, "{got}");
    }
}
