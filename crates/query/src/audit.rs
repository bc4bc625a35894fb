//! The review queue: tagged pictures whose tags their picture does not support.

use ndarray::Array2;
use serde::Serialize;
use tagweave_eval::metrics::column_midranks;

use crate::{Queries, Result, TagScore};

/// Carried tags whose picture ranks in this lowest share of the collection for the
/// tag are listed as disputed.
const DISPUTED_BELOW: f64 = 0.2;
/// Proposed tags: not carried, at least this probable.
const PROPOSED_FROM: f32 = 0.5;
/// Most proposals listed per picture.
const PROPOSED_MAX: usize = 3;

/// One carried tag the picture does not support.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DisputedTag {
    pub tag: String,
    pub probability: f32,
    /// Where the picture stands among all tagged pictures for this tag, in (0, 1):
    /// near 0 = hardly any picture fits the tag worse.
    pub standing: f64,
}

/// A picture in the review queue.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Dispute {
    pub picture: String,
    /// 1 − the standing of its most disputed tag: higher = review first.
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
        Ok(self.disputes(&rows, &probabilities))
    }

    fn disputes(&self, rows: &[usize], probabilities: &Array2<f32>) -> Vec<Dispute> {
        let n = rows.len() as f64;
        let standing = (column_midranks(probabilities.view()) - 0.5) / n;
        let mut out: Vec<Dispute> = rows
            .iter()
            .enumerate()
            .map(|(r, &i)| {
                let item = &self.items[i];
                let mut judged: Vec<DisputedTag> = item
                    .tags
                    .iter()
                    .filter_map(|t| {
                        let c = *self.tag_column.get(t)?;
                        Some(DisputedTag {
                            tag: t.clone(),
                            probability: probabilities[[r, c]],
                            standing: standing[[r, c]],
                        })
                    })
                    .collect();
                judged.sort_by(|a, b| a.standing.total_cmp(&b.standing));
                let score = judged.first().map_or(0.0, |d| 1.0 - d.standing);
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
                        .filter(|d| d.standing < DISPUTED_BELOW)
                        .collect(),
                    proposed,
                }
            })
            .collect();
        out.sort_by(|a, b| b.score.total_cmp(&a.score).then(a.picture.cmp(&b.picture)));
        out
    }
}
