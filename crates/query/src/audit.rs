//! The review queue: tagged pictures whose tags their picture does not support.

use ndarray::Array2;
use serde::Serialize;
use tagweave_suggest::ranking::column_midranks;

use crate::{Queries, Result, TagScore};

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
        let n = rows.len() as f64;
        let standing = (column_midranks(shares.view()) - 0.5) / n;
        let mut out: Vec<Dispute> = rows
            .iter()
            .enumerate()
            .map(|(r, &i)| {
                let item = &self.items[i];
                let mut judged: Vec<DisputedTag> = item
                    .tags
                    .iter()
                    .filter_map(|t| {
                        let c = self.columns.index_of(t)?;
                        Some(DisputedTag {
                            tag: t.clone(),
                            neighbours_carrying: shares[[r, c]],
                            standing: standing[[r, c]],
                        })
                    })
                    .collect();
                judged.sort_by(|a, b| a.standing.total_cmp(&b.standing));
                // Least-supported tag first; among equally unsupported ones, the picture
                // whose tags are less supported on the whole.
                let doubt: Vec<f64> = judged
                    .iter()
                    .map(|d| 1.0 - f64::from(d.neighbours_carrying))
                    .collect();
                let mean_doubt = doubt.iter().sum::<f64>() / doubt.len().max(1) as f64;
                let score = doubt.iter().copied().fold(0.0, f64::max) + TIE_WEIGHT * mean_doubt;
                let proposed = self
                    .tag_scores(&probabilities.row(r).to_vec(), &item.tags)
                    .into_iter()
                    .filter(|s| !s.carried && s.probability >= PROPOSED_FROM)
                    .take(PROPOSED_MAX)
                    .collect();
                Dispute {
                    picture: item.rel_path.clone(),
                    score,
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
}
