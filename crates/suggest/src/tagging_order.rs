//! Which untagged pictures a person should tag by hand next, so that the suggestions for all
//! the others improve most per picture tagged.
//!
//! Two published ways of choosing, and a mix of them:
//! - farthest first: each next picture is the one least like any tagged (or already chosen)
//!   picture — the greedy 2-approximation of the k-center problem (Gonzalez 1985, "Clustering
//!   to minimize the maximum intercluster distance"), used to choose training examples as a
//!   "core set" by Sener & Savarese (2018, "Active learning for convolutional neural
//!   networks: a core-set approach");
//! - least sure: the pictures whose likeliest tag is least likely — uncertainty sampling
//!   (Lewis & Gale 1994, "A sequential algorithm for training text classifiers"), its
//!   least-confidence form. (Summing min(p, 1 − p) over every tag instead, the expected
//!   number of wrong yes/no calls, measured worse: 0.69–0.86× random picking on the stamps
//!   set against 0.93–1.18× for least confidence; BENCHMARKS.md.)
//!
//! Similarity is the cosine of scaled feature rows, as the kNN scorer measures it. Pure
//! computation: deterministic for the same inputs (ties go to the lower row).

use ndarray::{ArrayView1, ArrayView2};

/// A candidate at least this similar (cosine) to a tagged picture is a near-duplicate of it
/// and is never proposed: tagging it teaches the model nothing new. Common practice for
/// near-duplicate cut-offs on normalised descriptors (from memory, not a published value).
pub const NEAR_DUPLICATE: f32 = 0.98;

/// How the next pictures are chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum TaggingStrategy {
    /// Farthest first: unlike anything tagged yet.
    Unlike,
    /// Least sure: its likeliest tag is least likely.
    Unsure,
    /// Alternating the two, starting with farthest first.
    Mixed,
}

impl TaggingStrategy {
    pub const ALL: [TaggingStrategy; 3] = [Self::Unlike, Self::Unsure, Self::Mixed];

    /// Name in reports and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            Self::Unlike => "unlike-tagged",
            Self::Unsure => "least-sure",
            Self::Mixed => "mixed",
        }
    }

    /// Whether choosing needs the model's scores for the candidates.
    pub fn needs_scores(self) -> bool {
        !matches!(self, Self::Unlike)
    }
}

/// Why a picture was chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PickReason {
    /// `nearest` is its cosine similarity to the most similar tagged or already chosen
    /// picture (`None`: nothing was tagged or chosen yet).
    Unlike { nearest: Option<f32> },
    /// The model's two likeliest tag columns for it and their scores.
    Unsure { best: [(usize, f32); 2] },
}

/// One chosen picture: its row in the candidate matrix and why.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Pick {
    pub row: usize,
    pub reason: PickReason,
}

/// What choosing works from, one row per picture of the collection.
#[derive(Debug, Clone, Copy)]
pub struct TaggingPool<'a> {
    /// Scaled feature rows, unit length (zero rows stay zero).
    pub unit: ArrayView2<'a, f32>,
    /// Pictures that carry tags already.
    pub tagged: &'a [bool],
    /// Pictures never to propose (e.g. the same content as a tagged picture).
    pub excluded: &'a [bool],
    /// The model's tag scores per picture (`None`: no model yet; least sure then falls back
    /// to farthest first).
    pub scores: Option<ArrayView2<'a, f32>>,
}

/// Chooses up to `count` pictures to tag next with `strategy`. Candidates are the pictures
/// neither tagged nor excluded nor a near-duplicate of a tagged one ([`NEAR_DUPLICATE`]).
/// With nothing tagged, farthest first starts from the picture least like the collection's
/// average, so the list is the most varied pictures.
pub fn choose_pictures_to_tag(
    pool: &TaggingPool,
    strategy: TaggingStrategy,
    count: usize,
) -> Vec<Pick> {
    let n = pool.unit.nrows();
    // Similarity of every picture to its most similar tagged (then also chosen) picture.
    let mut nearest: Vec<Option<f32>> = vec![None; n];
    for (j, _) in pool.tagged.iter().enumerate().filter(|(_, &t)| t) {
        raise_nearest(&mut nearest, pool.unit, pool.unit.row(j));
    }
    let mut open: Vec<bool> = (0..n)
        .map(|i| {
            !pool.tagged[i] && !pool.excluded[i] && nearest[i].is_none_or(|s| s < NEAR_DUPLICATE)
        })
        .collect();
    let doubt = pool.scores.map(|scores| {
        scores
            .outer_iter()
            .map(|row| best_two(row))
            .collect::<Vec<_>>()
    });
    let mut picks = Vec::new();
    let mut unlike_turn = true;
    while picks.len() < count {
        let unlike = match strategy {
            TaggingStrategy::Unlike => true,
            TaggingStrategy::Unsure => false,
            TaggingStrategy::Mixed => unlike_turn,
        } || doubt.is_none();
        unlike_turn = !unlike_turn;
        let pick = if unlike {
            farthest(&open, &nearest, pool.unit).map(|row| Pick {
                row,
                reason: PickReason::Unlike {
                    nearest: nearest[row],
                },
            })
        } else {
            doubt.as_ref().and_then(|best| {
                least_sure(&open, best).map(|row| Pick {
                    row,
                    reason: PickReason::Unsure { best: best[row] },
                })
            })
        };
        let Some(pick) = pick else { break };
        open[pick.row] = false;
        raise_nearest(&mut nearest, pool.unit, pool.unit.row(pick.row));
        picks.push(pick);
    }
    picks
}

fn raise_nearest(nearest: &mut [Option<f32>], unit: ArrayView2<f32>, chosen: ArrayView1<f32>) {
    let sims = unit.dot(&chosen);
    for (best, &s) in nearest.iter_mut().zip(sims.iter()) {
        *best = Some(best.map_or(s, |b| b.max(s)));
    }
}

/// The open picture least similar to anything covered; before anything is covered, the one
/// least like the average picture.
fn farthest(open: &[bool], nearest: &[Option<f32>], unit: ArrayView2<f32>) -> Option<usize> {
    let covered = nearest.iter().any(Option::is_some);
    let distance_from_average = (!covered).then(|| {
        let mean = unit.mean_axis(ndarray::Axis(0)).unwrap_or_default();
        unit.dot(&mean)
    });
    let key = |i: usize| match &distance_from_average {
        Some(sims) => sims[i],
        None => nearest[i].unwrap_or(f32::NEG_INFINITY),
    };
    (0..open.len())
        .filter(|&i| open[i])
        .min_by(|&a, &b| key(a).total_cmp(&key(b)).then(a.cmp(&b)))
}

/// The open picture whose likeliest tag scores lowest.
fn least_sure(open: &[bool], best: &[[(usize, f32); 2]]) -> Option<usize> {
    (0..open.len())
        .filter(|&i| open[i])
        .min_by(|&a, &b| best[a][0].1.total_cmp(&best[b][0].1).then(a.cmp(&b)))
}

/// The two highest-scoring columns of a row (ties to the lower column).
fn best_two(row: ArrayView1<f32>) -> [(usize, f32); 2] {
    let mut best = [(0, f32::NEG_INFINITY); 2];
    for (c, &s) in row.iter().enumerate() {
        if s > best[0].1 {
            best = [(c, s), best[0]];
        } else if s > best[1].1 {
            best[1] = (c, s);
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array2};

    fn unit(x: Array2<f32>) -> Array2<f32> {
        let mut x = x;
        for mut r in x.outer_iter_mut() {
            let n = r.dot(&r).sqrt();
            if n > 0.0 {
                r /= n;
            }
        }
        x
    }

    // Worked by hand on the unit circle: pictures at 0° (tagged), 10°, 90°, 180° and 100°.
    // 10° is a near-duplicate of the tagged picture (cos 10° = 0.985 ≥ 0.98) and never
    // proposed. Nearest similarities: 90° → 0, 180° → −1, 100° → cos 100° = −0.17. First
    // 180°; then 90° (nearest 0) beats 100° (cos 80° = 0.17 to 180°); then 100°.
    #[test]
    fn farthest_first_follows_the_k_center_greedy_order() {
        let deg = |d: f32| [d.to_radians().cos(), d.to_radians().sin()];
        let rows = [0.0, 10.0, 90.0, 180.0, 100.0].map(deg);
        let x = unit(Array2::from_shape_fn((5, 2), |(i, j)| rows[i][j]));
        let tagged = [true, false, false, false, false];
        let pool = TaggingPool {
            unit: x.view(),
            tagged: &tagged,
            excluded: &[false; 5],
            scores: None,
        };
        let picks = choose_pictures_to_tag(&pool, TaggingStrategy::Unlike, 10);
        let rows: Vec<usize> = picks.iter().map(|p| p.row).collect();
        assert_eq!(rows, [3, 2, 4]);
        match picks[0].reason {
            PickReason::Unlike { nearest: Some(s) } => assert!((s + 1.0).abs() < 1e-5),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn with_nothing_tagged_the_first_pick_is_least_like_the_average() {
        let x = unit(array![[1.0f32, 0.0], [1.0, 0.1], [0.9, -0.1], [0.0, 1.0]]);
        let pool = TaggingPool {
            unit: x.view(),
            tagged: &[false; 4],
            excluded: &[false; 4],
            scores: None,
        };
        let picks = choose_pictures_to_tag(&pool, TaggingStrategy::Unlike, 2);
        assert_eq!(picks[0].row, 3);
        assert_eq!(picks[0].reason, PickReason::Unlike { nearest: None });
        assert_eq!(picks.len(), 2);
    }

    #[test]
    fn least_sure_orders_by_the_weakest_best_score_and_names_the_two_best_tags() {
        let x = unit(array![[1.0f32, 0.0], [0.0, 1.0], [1.0, 1.0], [-1.0, 0.5]]);
        let scores = array![
            [0.9f32, 0.1, 0.0],
            [0.2, 0.4, 0.3],
            [0.6, 0.5, 0.1],
            [0.1, 0.2, 0.7]
        ];
        let pool = TaggingPool {
            unit: x.view(),
            tagged: &[true, false, false, false],
            excluded: &[false; 4],
            scores: Some(scores.view()),
        };
        let picks = choose_pictures_to_tag(&pool, TaggingStrategy::Unsure, 5);
        let rows: Vec<usize> = picks.iter().map(|p| p.row).collect();
        assert_eq!(rows, [1, 2, 3]);
        assert_eq!(
            picks[0].reason,
            PickReason::Unsure {
                best: [(1, 0.4), (2, 0.3)]
            }
        );
    }

    #[test]
    fn excluded_and_tagged_pictures_are_never_proposed_and_mixed_alternates() {
        let x = unit(array![
            [1.0f32, 0.0],
            [0.0, 1.0],
            [-1.0, 0.0],
            [0.0, -1.0],
            [0.7, 0.7]
        ]);
        let scores = array![
            [0.9f32, 0.1],
            [0.5, 0.1],
            [0.8, 0.1],
            [0.3, 0.2],
            [0.95, 0.0]
        ];
        let tagged = [true, false, false, false, false];
        let excluded = [false, false, false, false, true];
        let pool = TaggingPool {
            unit: x.view(),
            tagged: &tagged,
            excluded: &excluded,
            scores: Some(scores.view()),
        };
        let picks = choose_pictures_to_tag(&pool, TaggingStrategy::Mixed, 10);
        let rows: Vec<usize> = picks.iter().map(|p| p.row).collect();
        // Unlike first: row 2 (cos −1 to the tagged row 0); then least sure among rows 1 and
        // 3 (row 4, the least sure of all, is excluded): row 3 (likeliest 0.3 against 0.5);
        // then unlike: row 1.
        assert_eq!(rows, [2, 3, 1]);
        assert!(matches!(picks[1].reason, PickReason::Unsure { .. }));
    }

    #[test]
    fn least_sure_without_scores_falls_back_to_farthest_first() {
        let x = unit(array![[1.0f32, 0.0], [0.0, 1.0], [-1.0, 0.0]]);
        let pool = TaggingPool {
            unit: x.view(),
            tagged: &[true, false, false],
            excluded: &[false; 3],
            scores: None,
        };
        let picks = choose_pictures_to_tag(&pool, TaggingStrategy::Unsure, 1);
        assert_eq!(picks[0].row, 2);
    }
}
