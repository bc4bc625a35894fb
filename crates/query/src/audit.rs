//! The review queue: tagged pictures whose tags their picture does not support.

use ndarray::{Array2, ArrayView2};
use serde::Serialize;
use tagweave_collection::ItemRecord;
use tagweave_suggest::ranking::column_midranks;
use tagweave_suggest::TagColumns;

use crate::{tag_scores, Queries, Result, TagScore};

/// Carried tags that fewer than this (similarity-weighted) share of the picture's
/// most similar pictures carry are listed as disputed.
const DISPUTED_BELOW: f32 = 0.05;
/// Weight of the mean doubt over all carried tags in the score: breaks ties between
/// pictures whose worst tag has the same neighbour support (often none at all).
const TIE_WEIGHT: f64 = 1e-3;
/// Proposed tags: not carried, at least this probable.
const PROPOSED_FROM: f32 = 0.5;
/// Most proposals listed per picture.
const PROPOSED_MAX: usize = 3;

/// One carried tag the picture does not support.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DisputedTag {
    pub tag: String,
    /// Similarity-weighted share of the picture's most similar pictures carrying it.
    pub neighbours_carrying: f32,
    /// Where the picture stands among all tagged pictures for this tag, in (0, 1):
    /// near 0 = hardly any picture fits the tag worse.
    pub standing: f64,
}

/// A picture in the review queue.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Dispute {
    pub picture: String,
    /// 1 − the neighbour support of its least-supported tag (ties broken by the mean
    /// over its tags): higher = review first.
    pub score: f64,
    pub disputed: Vec<DisputedTag>,
    /// Tags the picture does not carry but probably should.
    pub proposed: Vec<TagScore>,
}

impl Queries {
    /// Every tagged picture judged without leaning on its own tags, worst first.
    ///
    /// A picture is ranked by its MOST disputed tag, not the mean over its tags: one
    /// wrong tag among several right ones is the usual mistake, and a mean hides it.
    /// Standings are ranks within each tag's column, so rare and common tags compare.
    pub fn audit(&self) -> Result<Vec<Dispute>> {
        let rows: Vec<usize> = (0..self.items.len())
            .filter(|&i| !self.items[i].tags.is_empty())
            .collect();
        if rows.is_empty() {
            return Ok(Vec::new());
        }
        let probabilities = self.suggest_rows(&rows)?;
        let shares = self.neighbour_shares(&rows)?;
        Ok(self.disputes(&rows, &probabilities, &shares))
    }

    /// `probabilities` propose missing tags; `shares` (leave-one-out: the model's
    /// read-out has seen every tagged picture's tags, its neighbours have not) judge
    /// the carried ones.
    fn disputes(
        &self,
        rows: &[usize],
        probabilities: &Array2<f32>,
        shares: &Array2<f32>,
    ) -> Vec<Dispute> {
        let judged: Vec<&ItemRecord> = rows.iter().map(|&i| &self.items[i]).collect();
        rank_disputes(&judged, &self.columns, probabilities.view(), shares.view())
    }
}

/// Row `r` of `probabilities` and `shares` belongs to `pictures[r]`; columns are
/// `columns`. Each picture's carried tags (those the columns know) are judged by their
/// shares and ranked within each tag's column; pictures come worst first.
fn rank_disputes(
    pictures: &[&ItemRecord],
    columns: &TagColumns,
    probabilities: ArrayView2<f32>,
    shares: ArrayView2<f32>,
) -> Vec<Dispute> {
    let n = pictures.len() as f64;
    let standing = (column_midranks(shares) - 0.5) / n;
    let mut out: Vec<Dispute> = pictures
        .iter()
        .enumerate()
        .map(|(r, item)| {
            let mut judged: Vec<DisputedTag> = item
                .tags
                .iter()
                .filter_map(|t| {
                    let c = columns.index_of(t)?;
                    Some(DisputedTag {
                        tag: t.clone(),
                        neighbours_carrying: shares[[r, c]],
                        standing: standing[[r, c]],
                    })
                })
                .collect();
            judged.sort_by(|a, b| a.standing.total_cmp(&b.standing));
            let doubt: Vec<f64> = judged
                .iter()
                .map(|d| 1.0 - f64::from(d.neighbours_carrying))
                .collect();
            let proposed = tag_scores(columns.tags(), &probabilities.row(r).to_vec(), &item.tags)
                .into_iter()
                .filter(|s| !s.carried && s.probability >= PROPOSED_FROM)
                .take(PROPOSED_MAX)
                .collect();
            Dispute {
                picture: item.rel_path.clone(),
                score: review_score(&doubt),
                disputed: judged
                    .into_iter()
                    .filter(|d| d.neighbours_carrying < DISPUTED_BELOW)
                    .collect(),
                proposed,
            }
        })
        .collect();
    out.sort_by(|a, b| b.score.total_cmp(&a.score).then(a.picture.cmp(&b.picture)));
    out
}

/// Least-supported tag first (the largest doubt, 1 − neighbour share); among equally
/// unsupported pictures, the one whose tags are less supported on the whole.
fn review_score(doubts: &[f64]) -> f64 {
    let mean_doubt = doubts.iter().sum::<f64>() / doubts.len().max(1) as f64;
    doubts.iter().copied().fold(0.0, f64::max) + TIE_WEIGHT * mean_doubt
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tests::{item, strings};

    /// Shares are f32, so doubts carry f32 rounding (0.6f32 = 0.60000002…).
    fn close(a: f64, b: f64) {
        assert!((a - b).abs() < 1e-6, "{a} != {b}");
    }

    // Worked by hand. Columns boat (0), sea (1); "fog" is unknown to the model.
    //   a.jpg carries boat       shares [0.0, 0.9]   probabilities [0.3, 0.7]
    //   b.jpg carries boat, sea  shares [0.8, 0.02]  probabilities [0.9, 0.4]
    //   c.jpg carries sea, fog   shares [0.1, 0.6]   probabilities [0.55, 0.8]
    // Standings (mid-rank − ½) / 3: boat [1/6, 5/6, 1/2], sea [5/6, 1/6, 1/2].
    // Doubts 1 − share: a {boat 1} → 1 + 0.001·1 = 1.001; b {boat 0.2, sea 0.98} →
    // 0.98 + 0.001·0.59 = 0.98059; c {sea 0.4} → 0.4 + 0.001·0.4 = 0.4004.
    // Disputed (share < 0.05): a boat, b sea. Proposed (not carried, p ≥ 0.5): a sea 0.7,
    // c boat 0.55.
    #[test]
    fn audit_ranks_pictures_by_their_least_supported_tag() {
        let pictures = [
            item("a.jpg", &["boat"]),
            item("b.jpg", &["boat", "sea"]),
            item("c.jpg", &["sea", "fog"]),
        ];
        let judged: Vec<&ItemRecord> = pictures.iter().collect();
        let columns = TagColumns::from_items([strings(&["sea", "boat"]).as_slice()]);
        let shares = ndarray::array![[0.0f32, 0.9], [0.8, 0.02], [0.1, 0.6]];
        let probabilities = ndarray::array![[0.3f32, 0.7], [0.9, 0.4], [0.55, 0.8]];
        let queue = rank_disputes(&judged, &columns, probabilities.view(), shares.view());
        let order: Vec<&str> = queue.iter().map(|d| d.picture.as_str()).collect();
        assert_eq!(order, ["a.jpg", "b.jpg", "c.jpg"]);
        for (d, want) in queue.iter().zip([1.001, 0.98059, 0.4004]) {
            close(d.score, want);
        }
        let disputed = |d: &Dispute| -> Vec<(String, f64)> {
            d.disputed
                .iter()
                .map(|t| (t.tag.clone(), t.standing))
                .collect()
        };
        assert_eq!(disputed(&queue[0]), [("boat".to_string(), 1.0 / 6.0)]);
        assert_eq!(disputed(&queue[1]), [("sea".to_string(), 1.0 / 6.0)]);
        assert!(queue[2].disputed.is_empty());
        assert_eq!(queue[1].disputed[0].neighbours_carrying, 0.02);
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

    // worked by hand: [1] → 1 + 0.001 = 1.001; [1, 0] → 1 + 0.001·0.5 = 1.0005; [] → 0.
    #[test]
    fn equally_unsupported_pictures_are_ordered_by_their_mean_doubt() {
        close(review_score(&[1.0]), 1.001);
        close(review_score(&[1.0, 0.0]), 1.0005);
        assert!(review_score(&[1.0]) > review_score(&[1.0, 0.0]));
        assert_eq!(review_score(&[]), 0.0);
    }

    // Worked by hand: four tags all at 0.9, one carried: the three others are proposed, in
    // tag order (the limit), and a fifth at 0.49 never is.
    #[test]
    fn at_most_three_tags_are_proposed() {
        let pictures = [item("a.jpg", &["d"])];
        let judged: Vec<&ItemRecord> = pictures.iter().collect();
        let columns = TagColumns::from_items([strings(&["a", "b", "c", "d", "e"]).as_slice()]);
        let probabilities = ndarray::array![[0.9f32, 0.9, 0.9, 0.9, 0.49]];
        let shares = ndarray::array![[0.0f32, 0.0, 0.0, 1.0, 0.0]];
        let queue = rank_disputes(&judged, &columns, probabilities.view(), shares.view());
        let proposed: Vec<&str> = queue[0].proposed.iter().map(|s| s.tag.as_str()).collect();
        assert_eq!(proposed, ["a", "b", "c"]);
        // its one carried tag is fully supported: no doubt, not disputed
        assert_eq!(queue[0].score, 0.0);
        assert!(queue[0].disputed.is_empty());
    }
}
