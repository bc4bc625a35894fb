//! The review queue: tagged pictures carrying a tag that neither their picture nor their
//! other tags support.
//!
//! Each carried tag is judged by two kinds of evidence that never saw the picture's own
//! tags: the share of its most similar tagged pictures carrying the tag (leave one
//! picture out), and how often the picture's *other* tags come with it on the other
//! tagged pictures (tag co-occurrence, the picture's own row taken out of the counts).
//! Their mix is chosen on the collection itself: every tagged picture is judged once as
//! it is and once with one tag it does not carry added at random, and the weight that
//! best ranks the altered copies first wins. People's tags are never the test here.

use ndarray::ArrayView2;
use rand::seq::IndexedRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use tagweave_suggest::ranking::roc_auc;
use tagweave_suggest::{TagColumns, TagCounts};

use crate::{by_probability_then_tag, Queries, Result, TagScore};

/// Carried tags whose mixed support is under this are listed as doubtful.
const DISPUTED_BELOW: f32 = 0.05;
/// Weight of the mean doubt over all carried tags in the score: breaks ties between
/// pictures whose worst tag has the same support (often none at all).
const TIE_WEIGHT: f64 = 1e-3;
/// Proposed tags: not carried, at least this probable.
const PROPOSED_FROM: f32 = 0.5;
/// Most proposals listed per picture.
const PROPOSED_MAX: usize = 3;
/// Seed of the tags added at random to choose the mix: the same store gives the same queue.
const ADDED_TAG_SEED: u64 = 0x6175_6469;
/// Neighbour weights tried for the mix (the rest goes to the other tags).
const NEIGHBOUR_WEIGHTS: [f32; 5] = [0.0, 0.25, 0.5, 0.75, 1.0];

/// One carried tag and how well it is supported.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DisputedTag {
    pub tag: String,
    /// Similarity-weighted share of the picture's most similar pictures carrying it.
    pub neighbours_carrying: f32,
    /// Share of the other tagged pictures with the picture's other tags that carry it too
    /// (the least over those tags; the tag's frequency when it is the picture's only tag).
    pub with_its_other_tags: f32,
    /// The two mixed by the queue's weights (a weighted geometric mean): the doubt is
    /// 1 − support.
    pub support: f32,
}

/// A picture in the review queue.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Dispute {
    pub picture: String,
    /// 1 − the support of its least-supported tag (ties broken by the mean over its
    /// tags): higher = review first.
    pub score: f64,
    pub disputed: Vec<DisputedTag>,
    /// Tags the picture does not carry but probably should.
    pub proposed: Vec<TagScore>,
}

/// How the queue weighs its two kinds of evidence, and how well that mix found tags
/// added at random to the collection's own pictures.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct EvidenceMix {
    /// Weight of the similar pictures; the picture's other tags get the rest.
    pub neighbours: f32,
    pub other_tags: f32,
    /// ROC AUC of the copies with an added tag against the pictures as they are
    /// (`None` when there was nothing to compare, e.g. a single tag in the collection).
    pub added_tag_auc: Option<f64>,
}

/// The review queue, worst first, and the mix that ordered it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Audit {
    pub mix: EvidenceMix,
    pub queue: Vec<Dispute>,
}

impl Queries {
    /// Every tagged picture judged without leaning on its own tags, worst first.
    ///
    /// A picture is ranked by its MOST doubtful tag, not the mean over its tags: one
    /// wrong tag among several right ones is the usual mistake, and a mean hides it.
    pub fn audit(&self) -> Result<Audit> {
        let rows: Vec<usize> = self.items.tagged_rows()?.to_vec();
        if rows.is_empty() {
            return Ok(Audit {
                mix: EvidenceMix {
                    neighbours: 1.0,
                    other_tags: 0.0,
                    added_tag_auc: None,
                },
                queue: Vec::new(),
            });
        }
        // Of each picture only what the queue reads is kept (at a million pictures, the
        // records of the tagged ones held 150 MB, rows over every tag 2 × 127 MB).
        let (pictures, lists): (Vec<String>, Vec<Vec<usize>>) = self
            .items
            .records(&rows)?
            .into_iter()
            .map(|r| {
                let list = self.columns_of_tags(&r.tags);
                (r.rel_path, list)
            })
            .unzip();
        let added = tags_added_at_random(&lists, self.columns.len());
        let mut judged = Vec::with_capacity(rows.len());
        let mut proposed = Vec::with_capacity(rows.len());
        self.suggest_and_shares_by_batch(&rows, |at, probabilities, shares| {
            judged.extend(judge(&lists[at.clone()], &added[at.clone()], shares));
            proposed.extend(proposals(&lists[at], &self.columns, probabilities));
            Ok(())
        })?;
        let evidence = Evidence::gather(judged, self.columns.len());
        let mix = evidence.choose_mix();
        let queue = rank_disputes(pictures, &self.columns, proposed, &evidence, mix);
        Ok(Audit { mix, queue })
    }
}

/// What the audit keeps of one judged picture.
struct Judged {
    /// Its carried tag columns, ascending.
    carried: Vec<usize>,
    /// The neighbour share of each carried tag.
    shares: Vec<f32>,
    /// The tag added at random to choose the mix, with its neighbour share.
    added: Option<(usize, f32)>,
}

/// For each picture (its carried columns `lists[r]`), one tag it does not carry, drawn at
/// random with a fixed seed (the same store gives the same queue); `None` when it carries
/// every tag.
fn tags_added_at_random(lists: &[Vec<usize>], n_tags: usize) -> Vec<Option<usize>> {
    let mut rng = ChaCha8Rng::seed_from_u64(ADDED_TAG_SEED);
    lists
        .iter()
        .map(|list| {
            let absent: Vec<usize> = (0..n_tags).filter(|c| !list.contains(c)).collect();
            absent.choose(&mut rng).copied()
        })
        .collect()
}

/// Row `r` of `shares` (pictures × tags) belongs to `lists[r]` and `added[r]`.
fn judge(lists: &[Vec<usize>], added: &[Option<usize>], shares: ArrayView2<f32>) -> Vec<Judged> {
    lists
        .iter()
        .zip(added)
        .zip(shares.outer_iter())
        .map(|((list, added), row)| Judged {
            carried: list.clone(),
            shares: list.iter().map(|&c| row[c]).collect(),
            added: added.map(|c| (c, row[c])),
        })
        .collect()
}

/// The tags each picture does not carry but probably should, most probable first (row `r`
/// of `probabilities` belongs to the picture carrying the columns `lists[r]`).
fn proposals(
    lists: &[Vec<usize>],
    columns: &TagColumns,
    probabilities: ArrayView2<f32>,
) -> Vec<Vec<TagScore>> {
    lists
        .iter()
        .zip(probabilities.outer_iter())
        .map(|(list, row)| {
            let mut likely: Vec<TagScore> = row
                .iter()
                .enumerate()
                .filter(|&(c, &p)| p >= PROPOSED_FROM && !list.contains(&c))
                .map(|(c, &p)| TagScore {
                    tag: columns.tags()[c].clone(),
                    probability: p,
                    carried: false,
                })
                .collect();
            likely.sort_by(by_probability_then_tag);
            likely.truncate(PROPOSED_MAX);
            likely
        })
        .collect()
}

/// Per judged picture: its carried tags and, for each, the two supports.
struct Evidence {
    judged: Vec<Judged>,
    counts: TagCounts,
    /// `with_other_tags[r][k]`: co-occurrence support of `judged[r].carried[k]`.
    with_other_tags: Vec<Vec<f32>>,
}

impl Evidence {
    fn gather(judged: Vec<Judged>, n_tags: usize) -> Self {
        let lists: Vec<&[usize]> = judged.iter().map(|j| j.carried.as_slice()).collect();
        let counts = TagCounts::count(&lists, n_tags);
        let with_other_tags = lists
            .iter()
            .map(|list| counts.support_without(list, list))
            .collect();
        Evidence {
            judged,
            counts,
            with_other_tags,
        }
    }

    /// The neighbour weight whose queue best ranks each picture with its added tag above
    /// the pictures as they are; the first of equals, so a collection with nothing to
    /// learn from keeps the neighbours.
    fn choose_mix(&self) -> EvidenceMix {
        // (neighbour shares, co-occurrence supports) of each picture's tags, as it is
        // and with an added tag.
        let mut cases: Vec<(Vec<f32>, Vec<f32>, bool)> = Vec::new();
        for (judged, with_other_tags) in self.judged.iter().zip(&self.with_other_tags) {
            let Some((added, added_share)) = judged.added else {
                continue;
            };
            cases.push((judged.shares.clone(), with_other_tags.clone(), false));
            let altered = [judged.carried.as_slice(), &[added]].concat();
            let supports = self.counts.support_without(&altered, &judged.carried);
            let shares = [judged.shares.as_slice(), &[added_share]].concat();
            cases.push((shares, supports, true));
        }
        let added: Vec<bool> = cases.iter().map(|c| c.2).collect();
        let mut best = EvidenceMix {
            neighbours: 1.0,
            other_tags: 0.0,
            added_tag_auc: None,
        };
        for w in NEIGHBOUR_WEIGHTS.iter().rev() {
            let scores: Vec<f64> = cases
                .iter()
                .map(|(s, o, _)| review_score(&doubts(s, o, *w)))
                .collect();
            let auc = roc_auc(&scores, &added);
            if auc > best.added_tag_auc {
                best = EvidenceMix {
                    neighbours: *w,
                    other_tags: 1.0 - w,
                    added_tag_auc: auc,
                };
            }
        }
        best
    }
}

/// The support of a tag: the weighted geometric mean of its two supports, so that a
/// tag nearly absent from either side is doubted whatever the other says; the floor
/// keeps a share of 0 from silencing the weights.
fn mixed_support(neighbour_share: f32, with_other_tags: f32, neighbours: f32) -> f32 {
    const FLOOR: f32 = 1e-3;
    (neighbour_share + FLOOR).powf(neighbours) * (with_other_tags + FLOOR).powf(1.0 - neighbours)
}

/// 1 − the mixed support of each tag.
fn doubts(neighbour_shares: &[f32], with_other_tags: &[f32], neighbours: f32) -> Vec<f64> {
    neighbour_shares
        .iter()
        .zip(with_other_tags)
        .map(|(&s, &o)| 1.0 - f64::from(mixed_support(s, o, neighbours)))
        .collect()
}

/// Row `r` of the evidence and of `proposed` belongs to the picture at `pictures[r]`
/// (relative path); columns are `columns`. Each picture's carried tags (those the columns
/// know) are judged by their mixed support; pictures come worst first.
fn rank_disputes(
    pictures: Vec<String>,
    columns: &TagColumns,
    proposed: Vec<Vec<TagScore>>,
    evidence: &Evidence,
    mix: EvidenceMix,
) -> Vec<Dispute> {
    let mut out: Vec<Dispute> = pictures
        .into_iter()
        .zip(&evidence.judged)
        .zip(&evidence.with_other_tags)
        .zip(proposed)
        .map(|(((picture, judged), with_other_tags), proposed)| {
            let mut disputed: Vec<DisputedTag> = judged
                .carried
                .iter()
                .zip(&judged.shares)
                .zip(with_other_tags)
                .map(|((&c, &share), &with_others)| DisputedTag {
                    tag: columns.tags()[c].clone(),
                    neighbours_carrying: share,
                    with_its_other_tags: with_others,
                    support: mixed_support(share, with_others, mix.neighbours),
                })
                .collect();
            disputed.sort_by(|a, b| a.support.total_cmp(&b.support).then(a.tag.cmp(&b.tag)));
            let doubt: Vec<f64> = disputed
                .iter()
                .map(|d| 1.0 - f64::from(d.support))
                .collect();
            Dispute {
                picture,
                score: review_score(&doubt),
                disputed: disputed
                    .into_iter()
                    .filter(|d| d.support < DISPUTED_BELOW)
                    .collect(),
                proposed,
            }
        })
        .collect();
    out.sort_by(|a, b| b.score.total_cmp(&a.score).then(a.picture.cmp(&b.picture)));
    out
}

/// Least-supported tag first (the largest doubt); among equally unsupported pictures,
/// the one whose tags are less supported on the whole.
fn review_score(doubts: &[f64]) -> f64 {
    let mean_doubt = doubts.iter().sum::<f64>() / doubts.len().max(1) as f64;
    doubts.iter().copied().fold(0.0, f64::max) + TIE_WEIGHT * mean_doubt
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tests::{item, strings};
    use tagweave_collection::ItemRecord;

    /// The evidence of pictures carrying `lists`, given their shares over every tag.
    fn evidence(lists: &[Vec<usize>], shares: ArrayView2<f32>) -> Evidence {
        let added = tags_added_at_random(lists, shares.ncols());
        Evidence::gather(judge(lists, &added, shares), shares.ncols())
    }

    /// The queue of `pictures` with the evidence mixed half and half.
    fn half_and_half_queue(
        pictures: &[ItemRecord],
        columns: &TagColumns,
        lists: &[Vec<usize>],
        shares: ArrayView2<f32>,
        probabilities: &ndarray::Array2<f32>,
    ) -> Vec<Dispute> {
        let mix = EvidenceMix {
            neighbours: 0.5,
            other_tags: 0.5,
            added_tag_auc: None,
        };
        let proposed = proposals(lists, columns, probabilities.view());
        let paths = pictures.iter().map(|p| p.rel_path.clone()).collect();
        rank_disputes(paths, columns, proposed, &evidence(lists, shares), mix)
    }

    // Worked by hand. Columns boat (0), sea (1); "fog" is unknown to the model.
    //   a.jpg carries boat       shares [0.0, 0.9]   probabilities [0.3, 0.7]
    //   b.jpg carries boat, sea  shares [0.8, 0.02]  probabilities [0.9, 0.4]
    //   c.jpg carries sea, fog   shares [0.1, 0.6]   probabilities [0.55, 0.8]
    // Counts without the judged picture's own row: 2 pictures left, each tag carried by 1.
    //   a boat alone: frequency 1/2 = 0.5; c sea alone: 0.5;
    //   b boat given sea: (0 together + 0.5) / (1 carrying sea + 1) = 0.25; sea given boat 0.25.
    // Support at half and half = √((share + 0.001)(other + 0.001)):
    //   a boat √(0.001 · 0.501) = 0.022383; b boat √(0.801 · 0.251) = 0.448387,
    //   b sea √(0.021 · 0.251) = 0.072602; c sea √(0.601 · 0.501) = 0.548727.
    // Scores (max doubt + 0.001 · mean doubt): a 0.977617 + 0.000978 = 0.978595;
    //   b 0.927398 + 0.001 · 0.739506 = 0.928138; c 0.451273 + 0.000451 = 0.451724.
    // Doubtful (support < 0.05): a boat only. Proposed (not carried, p ≥ 0.5): a sea 0.7,
    //   c boat 0.55.
    #[test]
    fn audit_ranks_pictures_by_their_least_supported_tag() {
        let pictures = [
            item("a.jpg", &["boat"]),
            item("b.jpg", &["boat", "sea"]),
            item("c.jpg", &["sea", "fog"]),
        ];
        let columns = TagColumns::from_items([strings(&["boat", "sea"]).as_slice()]);
        let lists = [vec![0], vec![0, 1], vec![1]];
        let shares = ndarray::array![[0.0f32, 0.9], [0.8, 0.02], [0.1, 0.6]];
        let probabilities = ndarray::array![[0.3f32, 0.7], [0.9, 0.4], [0.55, 0.8]];
        assert_eq!(
            evidence(&lists, shares.view()).with_other_tags,
            [vec![0.5], vec![0.25, 0.25], vec![0.5]]
        );
        let queue = half_and_half_queue(&pictures, &columns, &lists, shares.view(), &probabilities);
        let order: Vec<&str> = queue.iter().map(|d| d.picture.as_str()).collect();
        assert_eq!(order, ["a.jpg", "b.jpg", "c.jpg"]);
        for (d, want) in queue.iter().zip([0.978_595, 0.928_138, 0.451_724]) {
            assert!((d.score - want).abs() < 2e-6, "{} != {want}", d.score);
        }
        let doubtful: Vec<(&str, &str)> = queue
            .iter()
            .flat_map(|d| {
                d.disputed
                    .iter()
                    .map(|t| (d.picture.as_str(), t.tag.as_str()))
            })
            .collect();
        assert_eq!(doubtful, [("a.jpg", "boat")]);
        assert!((queue[0].disputed[0].support - 0.022_383).abs() < 1e-6);
        let proposed = |d: &Dispute| -> Vec<(String, f32)> {
            d.proposed
                .iter()
                .map(|s| (s.tag.clone(), s.probability))
                .collect()
        };
        assert_eq!(proposed(&queue[0]), [("sea".to_string(), 0.7)]);
        assert!(queue[1].proposed.is_empty(), "both tags carried");
        assert_eq!(proposed(&queue[2]), [("boat".to_string(), 0.55)]);
    }

    // Six pictures in two kinds, {day, sun} and {night, moon}; the similar pictures say
    // nothing (every share 0.5). Added tags come from the other kind, so the other tags
    // see them at once: the mix must lean on the other tags, and find them.
    #[test]
    fn the_mix_leans_on_whichever_evidence_finds_added_tags() {
        let lists: Vec<Vec<usize>> = (0..6)
            .map(|i| if i % 2 == 0 { vec![0, 1] } else { vec![2, 3] })
            .collect();
        let flat = ndarray::Array2::from_elem((6, 4), 0.5f32);
        let mix = evidence(&lists, flat.view()).choose_mix();
        // every weight under 1 finds them all; the first tried (0.75) is kept
        assert_eq!(mix.neighbours, 0.75);
        assert_eq!(mix.added_tag_auc, Some(1.0));
        // Now the similar pictures know exactly which tags fit and the tags say nothing
        // (every picture carries the same two): the neighbours keep their full weight.
        let same: Vec<Vec<usize>> = (0..6).map(|_| vec![0, 1]).collect();
        let exact = ndarray::Array2::from_shape_fn((6, 4), |(_, c)| (c < 2) as u8 as f32);
        let mix = evidence(&same, exact.view()).choose_mix();
        assert_eq!(mix.neighbours, 1.0);
        assert_eq!(mix.added_tag_auc, Some(1.0));
        // A collection with one tag has nothing to add: neighbours, and no figure.
        let one: Vec<Vec<usize>> = (0..3).map(|_| vec![0]).collect();
        let ones = ndarray::Array2::from_elem((3, 1), 1.0f32);
        let mix = evidence(&one, ones.view()).choose_mix();
        assert_eq!((mix.neighbours, mix.added_tag_auc), (1.0, None));
    }

    // worked by hand: [1] → 1 + 0.001 = 1.001; [1, 0] → 1 + 0.001·0.5 = 1.0005; [] → 0.
    #[test]
    fn equally_unsupported_pictures_are_ordered_by_their_mean_doubt() {
        assert!((review_score(&[1.0]) - 1.001).abs() < 1e-12);
        assert!((review_score(&[1.0, 0.0]) - 1.0005).abs() < 1e-12);
        assert!(review_score(&[1.0]) > review_score(&[1.0, 0.0]));
        assert_eq!(review_score(&[]), 0.0);
    }

    // Worked by hand: four tags all at 0.9, one carried: the three others are proposed, in
    // tag order (the limit), and a fifth at 0.49 never is.
    #[test]
    fn at_most_three_tags_are_proposed() {
        let pictures = [item("a.jpg", &["d"])];
        let columns = TagColumns::from_items([strings(&["a", "b", "c", "d", "e"]).as_slice()]);
        let probabilities = ndarray::array![[0.9f32, 0.9, 0.9, 0.9, 0.49]];
        let shares = ndarray::array![[0.0f32, 0.0, 0.0, 1.0, 0.0]];
        let lists = [vec![3]];
        let queue = half_and_half_queue(&pictures, &columns, &lists, shares.view(), &probabilities);
        let proposed: Vec<&str> = queue[0].proposed.iter().map(|s| s.tag.as_str()).collect();
        assert_eq!(proposed, ["a", "b", "c"]);
    }
}
