//! Whether a picture is like the pictures the model learned from.
//!
//! Tags the model gives a picture unlike any it learned from are guesses, however sure
//! they look: a black-and-white drawing among harbour photographs still gets "day" at
//! 100 %. So each answer says how similar the picture is to its most similar tagged
//! picture, beside how similar the tagged pictures are to each other: a picture is
//! "unlike this collection" when its most similar tagged picture is less similar than it
//! is for [`USUAL_SHARE`] of the tagged pictures themselves (each judged against the
//! others, never itself).
//!
//! Similarity is the cosine of the picture features as the model reads them
//! (standardised), the measure the suggestions' similar-pictures part uses. The shared
//! codes were tried first and do not do: on the demo archive a line drawing's code lies
//! nearer a tagged picture's code (0.88) than the tagged pictures' own 1 % point (0.85),
//! while its features lie further (0.22) than any tagged picture's do from another (0.24).
//! The model maps what it has never seen into what it knows; the features do not.

use std::sync::OnceLock;

use ndarray::{Array1, Array2, ArrayView1, ArrayView2, Axis};
use serde::Serialize;

use crate::{Queries, Result};

/// Share of the tagged pictures whose similarity to their most similar other tagged
/// picture counts as usual: a picture less similar to every tagged picture than all but
/// 1 % of them is flagged.
pub const USUAL_SHARE: f64 = 0.99;
/// Most tagged pictures compared with (evenly spread over them when there are more): a
/// picture's nearest is sought among these, for the reference as for any picture asked
/// about, so both are measured alike.
const MEMORY: usize = 2000;
/// Most of those measured for the reference (each against the others).
const PROBES: usize = 1000;
/// Fewest reference values for a usual similarity to mean anything.
const MIN_REFERENCE: usize = 5;

/// How a picture compares with the pictures the model learned from.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Familiarity {
    /// Cosine similarity of its features to those of its most similar tagged picture
    /// (never itself).
    pub nearest_similarity: f32,
    /// The similarity [`USUAL_SHARE`] of the tagged pictures reach with their own most
    /// similar other tagged picture (`None`: too few tagged pictures to say).
    pub usual_similarity: Option<f32>,
    /// `nearest_similarity` below `usual_similarity`: its tags are guesses.
    pub unlike_collection: bool,
}

impl Familiarity {
    fn judge(nearest_similarity: f32, usual_similarity: Option<f32>) -> Familiarity {
        Familiarity {
            nearest_similarity,
            usual_similarity,
            unlike_collection: usual_similarity.is_some_and(|usual| nearest_similarity < usual),
        }
    }
}

/// The tagged pictures' features to compare with, and the usual similarity among them;
/// made once per opened store, when first asked.
pub(crate) struct Memory {
    /// Item rows of the remembered tagged pictures.
    rows: Vec<usize>,
    /// Their features, scaled, each row of length 1.
    unit: Array2<f32>,
    usual: Option<f32>,
}

pub(crate) type MemoryCache = OnceLock<Memory>;

/// Name of the memory kept beside the store ([`tagweave_store::KeptAnswers`]): working it
/// out reads 2,000 pictures' features and compares 1,000 of them with all 2,000, most of a
/// `suggest PICTURE`'s time at a million pictures.
pub(crate) const KEPT_AS: &str = "familiar";
/// First bytes of a kept memory.
const MAGIC: &[u8; 8] = b"twfamil1";

/// Rows scaled to length 1 (an all-zero row stays zero).
fn unit_rows(x: ArrayView2<f32>) -> Array2<f32> {
    let mut unit = x.to_owned();
    for mut row in unit.outer_iter_mut() {
        let norm = row.dot(&row).sqrt();
        if norm > 0.0 {
            row.mapv_inplace(|v| v / norm);
        }
    }
    unit
}

/// Per query row, the highest similarity among the memory's columns, leaving out the
/// column `skip[i]` (the query itself); `NEG_INFINITY` when nothing is left.
fn best_similarities(similarities: ArrayView2<f32>, skip: &[Option<usize>]) -> Vec<f32> {
    similarities
        .outer_iter()
        .enumerate()
        .map(|(i, row)| {
            row.iter()
                .enumerate()
                .filter(|&(j, _)| skip.get(i).copied().flatten() != Some(j))
                .map(|(_, &s)| s)
                .fold(f32::NEG_INFINITY, f32::max)
        })
        .collect()
}

/// The value below which `1 − share` of `values` lie (the lower quantile, nearest rank);
/// `None` for fewer than [`MIN_REFERENCE`] values.
fn lower_quantile(mut values: Vec<f32>, share: f64) -> Option<f32> {
    values.retain(|v| v.is_finite());
    if values.len() < MIN_REFERENCE {
        return None;
    }
    values.sort_by(f32::total_cmp);
    let rank = ((1.0 - share) * values.len() as f64).floor() as usize;
    Some(values[rank.min(values.len() - 1)])
}

/// Evenly spread picks of at most `most` of `rows`, in their order.
fn spread(rows: &[usize], most: usize) -> Vec<usize> {
    if rows.len() <= most {
        return rows.to_vec();
    }
    (0..most).map(|i| rows[i * rows.len() / most]).collect()
}

impl Memory {
    /// From remembered item rows and their scaled features (same order).
    fn build(rows: Vec<usize>, scaled: ArrayView2<f32>) -> Memory {
        let unit = unit_rows(scaled);
        let probes: Vec<usize> = spread(&(0..rows.len()).collect::<Vec<_>>(), PROBES);
        let similarities = unit.select(Axis(0), &probes).dot(&unit.t());
        let skip: Vec<Option<usize>> = probes.iter().map(|&p| Some(p)).collect();
        let usual = lower_quantile(best_similarities(similarities.view(), &skip), USUAL_SHARE);
        Memory { rows, unit, usual }
    }

    /// The memory as kept: magic, usual similarity (NaN: none), count and width (u64),
    /// the item rows (u32), the unit features (f32), little-endian.
    fn to_bytes(&self) -> Vec<u8> {
        let (n, width) = self.unit.dim();
        let mut out = Vec::with_capacity(32 + n * 4 + n * width * 4);
        out.extend_from_slice(MAGIC);
        out.extend_from_slice(&self.usual.unwrap_or(f32::NAN).to_le_bytes());
        out.extend_from_slice(&(n as u64).to_le_bytes());
        out.extend_from_slice(&(width as u64).to_le_bytes());
        for &row in &self.rows {
            out.extend_from_slice(&(row as u32).to_le_bytes());
        }
        for &value in self.unit.iter() {
            out.extend_from_slice(&value.to_le_bytes());
        }
        out
    }

    /// A kept memory of features `width` wide over `items` item rows; `None` when it is
    /// not one (damaged, cut short, of another width).
    fn from_bytes(bytes: &[u8], width: usize, items: usize) -> Option<Memory> {
        let rest = bytes.strip_prefix(MAGIC.as_slice())?;
        let number = |at: usize| -> Option<u64> {
            Some(u64::from_le_bytes(rest.get(at..at + 8)?.try_into().ok()?))
        };
        let usual = f32::from_le_bytes(rest.get(..4)?.try_into().ok()?);
        let n = usize::try_from(number(4)?).ok()?;
        if number(12)? != width as u64 || rest.len() != 20 + n * 4 + n * width * 4 {
            return None;
        }
        let words = |from: usize| {
            rest[from..]
                .chunks_exact(4)
                .map(|b| <[u8; 4]>::try_from(b).expect("four bytes"))
        };
        let rows: Vec<usize> = words(20)
            .take(n)
            .map(|b| u32::from_le_bytes(b) as usize)
            .collect();
        if rows.iter().any(|&r| r >= items) {
            return None;
        }
        let values: Vec<f32> = words(20 + n * 4).map(f32::from_le_bytes).collect();
        Some(Memory {
            rows,
            unit: Array2::from_shape_vec((n, width), values).ok()?,
            usual: (!usual.is_nan()).then_some(usual),
        })
    }

    /// Familiarity of feature rows `x` (scaled); `items[i]`: the item row of `x`'s row
    /// `i`, if it is an indexed picture (never compared with itself).
    fn judge(&self, x: ArrayView2<f32>, items: &[Option<usize>]) -> Vec<Familiarity> {
        let similarities = unit_rows(x).dot(&self.unit.t());
        let skip: Vec<Option<usize>> = items
            .iter()
            .map(|item| item.and_then(|r| self.rows.iter().position(|&m| m == r)))
            .collect();
        best_similarities(similarities.view(), &skip)
            .into_iter()
            .map(|s| Familiarity::judge(if s.is_finite() { s } else { 0.0 }, self.usual))
            .collect()
    }
}

impl Queries {
    pub(crate) fn memory(&self) -> Result<&Memory> {
        if let Some(memory) = self.memory.get() {
            return Ok(memory);
        }
        let width = self.trained.feature_width();
        let kept = self.kept_memory.read();
        let memory = match kept.and_then(|b| Memory::from_bytes(&b, width, self.items.len())) {
            Some(memory) => memory,
            None => {
                let tagged = self.items.tagged_rows()?;
                let (rows, scaled) = self.read_scaled(&spread(tagged, MEMORY))?;
                let memory = Memory::build(rows, scaled.view());
                self.kept_memory.keep(&memory.to_bytes());
                memory
            }
        };
        Ok(self.memory.get_or_init(|| memory))
    }

    /// How similar each indexed picture (rows) is to the tagged pictures, itself left out.
    pub fn familiarity_of_rows(&self, rows: &[usize]) -> Result<Vec<Familiarity>> {
        let mut judged = Vec::with_capacity(rows.len());
        for batch in rows.chunks(crate::READ_BATCH) {
            let x = self.scaled_rows(batch)?;
            let items: Vec<Option<usize>> = batch.iter().map(|&r| Some(r)).collect();
            judged.extend(self.memory()?.judge(x.view(), &items));
        }
        Ok(judged)
    }

    /// How similar a picture outside the index (its scaled features) is to the tagged
    /// pictures.
    pub(crate) fn familiarity_of_features(&self, x: ArrayView1<f32>) -> Result<Familiarity> {
        let x: Array2<f32> = Array1::from(x.to_vec()).insert_axis(Axis(0));
        Ok(self.memory()?.judge(x.view(), &[None])[0])
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    // Worked by hand: 100 values 0.01, 0.02, …, 1.00; the lowest 1 % is one value, so the
    // usual similarity is the second lowest, 0.02: 99 of the 100 reach it.
    #[test]
    fn the_usual_similarity_is_the_lower_one_percent_point() {
        let values: Vec<f32> = (1..=100).rev().map(|i| i as f32 / 100.0).collect();
        assert_eq!(lower_quantile(values, 0.99), Some(0.02));
        assert_eq!(
            lower_quantile(vec![0.5, 0.9, 0.7, 0.8, 0.6], 0.99),
            Some(0.5)
        );
        assert_eq!(lower_quantile(vec![0.5, 0.9], 0.99), None, "too few to say");
        assert_eq!(lower_quantile(vec![f32::NAN; 9], 0.99), None);
    }

    #[test]
    fn a_picture_further_than_usual_is_unlike_the_collection() {
        assert!(Familiarity::judge(0.6, Some(0.8)).unlike_collection);
        assert!(!Familiarity::judge(0.8, Some(0.8)).unlike_collection);
        assert!(
            !Familiarity::judge(0.1, None).unlike_collection,
            "no reference, no flag"
        );
    }

    #[test]
    fn a_kept_memory_reads_back_as_it_was_and_a_damaged_one_not_at_all() {
        let scaled = array![
            [1.0f32, 0.0, 2.0],
            [0.5, 0.5, 0.0],
            [0.0, 3.0, 1.0],
            [1.0, 1.0, 1.0],
            [2.0, 0.0, 0.0]
        ];
        let memory = Memory::build(vec![4, 9, 2, 7, 0], scaled.view());
        let bytes = memory.to_bytes();
        let back = Memory::from_bytes(&bytes, 3, 10).unwrap();
        assert_eq!(back.rows, memory.rows);
        assert_eq!(back.unit, memory.unit);
        assert_eq!(back.usual, memory.usual);
        assert!(Memory::from_bytes(&bytes, 4, 10).is_none(), "another width");
        assert!(
            Memory::from_bytes(&bytes, 3, 9).is_none(),
            "a row past the items"
        );
        assert!(
            Memory::from_bytes(&bytes[..bytes.len() - 1], 3, 10).is_none(),
            "cut short"
        );
        let none = Memory::build(vec![1], array![[1.0f32, 0.0, 0.0]].view());
        assert_eq!(none.usual, None);
        assert_eq!(
            Memory::from_bytes(&none.to_bytes(), 3, 2).unwrap().usual,
            None
        );
    }

    #[test]
    fn probes_are_spread_evenly() {
        let rows: Vec<usize> = (0..10).collect();
        assert_eq!(spread(&rows, 20), rows);
        assert_eq!(spread(&rows, 5), [0, 2, 4, 6, 8]);
    }

    // Worked by hand: six tagged pictures in two tight pairs of directions and a third
    // pair; each one's most similar other is its twin (cosine ≥ 0.99), so the usual
    // similarity is high. A picture at right angles to all of them (cosine 0) is unlike
    // the collection; a copy of one of them is not, and an indexed picture is never its
    // own nearest.
    #[test]
    fn a_picture_at_right_angles_to_every_tagged_one_is_flagged() {
        let scaled = array![
            [1.0f32, 0.0, 0.0, 0.0],
            [0.99, 0.1, 0.0, 0.0],
            [0.0, 1.0, 0.0, 0.0],
            [0.1, 0.99, 0.0, 0.0],
            [0.0, 0.0, 1.0, 0.0],
            [0.0, 0.1, 0.99, 0.0],
        ];
        let memory = Memory::build(vec![0, 1, 2, 3, 4, 5], scaled.view());
        let usual = memory.usual.unwrap();
        assert!(usual > 0.99 && usual < 1.0, "{usual}");
        let outside = array![[0.0f32, 0.0, 0.0, 3.0], [2.0, 0.0, 0.0, 0.0]];
        let judged = memory.judge(outside.view(), &[None, None]);
        assert!(judged[0].unlike_collection);
        assert_eq!(judged[0].nearest_similarity, 0.0);
        assert!(!judged[1].unlike_collection);
        assert!((judged[1].nearest_similarity - 1.0).abs() < 1e-6);
        // picture 0 itself: its nearest is its twin, not itself
        let itself = memory.judge(scaled.select(Axis(0), &[0]).view(), &[Some(0)]);
        assert!(itself[0].nearest_similarity < 0.9999, "{itself:?}");
    }
}
