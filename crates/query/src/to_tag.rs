//! Which pictures a person should tag by hand next (see `tagweave_suggest::choose_pictures_to_tag`
//! for the ways of choosing and their sources). Works before any training too: then the
//! list is the most varied untagged pictures, chosen on the features alone.

use std::collections::HashSet;

use ndarray::Array2;

use serde::Serialize;
use tagweave_store::{FeatureTable, Store};
use tagweave_suggest::{
    choose_pictures_to_tag, unit_rows, PickReason, Standardiser, TaggingPool, TaggingStrategy,
    TrainedModel, MODEL_FORMAT,
};

use crate::{Queries, QueryError, Result};

/// One picture to tag next, and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PictureToTag {
    pub picture: String,
    #[serde(flatten)]
    pub reason: ToTagReason,
}

/// Why a picture is on the list.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "why", rename_all = "kebab-case")]
pub enum ToTagReason {
    /// Unlike any tagged (or earlier listed) picture: `nearest_similarity` is the cosine
    /// similarity of its features to the most similar of them (`None`: nothing tagged yet).
    UnlikeTagged { nearest_similarity: Option<f32> },
    /// Its likeliest tags are less likely than for any other listed picture.
    ModelUnsure {
        likeliest: [String; 2],
        scores: [f32; 2],
    },
}

/// The list and what it was made from.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ToTagList {
    /// The way of choosing used (`least-sure` and `mixed` fall back to `unlike-tagged`
    /// without a trained model).
    pub way: &'static str,
    /// Whether the collection has a trained model (without one, pictures are chosen by
    /// look alone).
    pub trained: bool,
    /// Untagged pictures in the collection.
    pub untagged: usize,
    pub pictures: Vec<PictureToTag>,
}

/// Up to `count` untagged pictures to tag next, chosen the `strategy` way. Pictures with the
/// same content as a tagged one, or nearly the same features, are never listed; a picture
/// that failed to decode has no features and is never listed either.
pub fn pictures_to_tag(
    store: &Store,
    strategy: TaggingStrategy,
    count: usize,
) -> Result<ToTagList> {
    // Questions need the opened model; farthest first alone only needs the features,
    // scaled as the model would if there is one.
    let queries = if strategy.needs_scores() {
        match Queries::open(store) {
            Ok(queries) => Some(queries),
            Err(QueryError::NotTrained) => None,
            Err(error) => return Err(error),
        }
    } else {
        None
    };
    let model = match queries {
        Some(_) => None,
        None => store.model(MODEL_FORMAT, |m: &TrainedModel| m.format)?,
    };
    let trained = queries.is_some() || model.is_some();
    let table = FeatureTable::load(store)?;
    let scaled = match (&queries, &model) {
        (Some(q), _) => q.trained.scale(table.features.view())?,
        (None, Some(model)) => model.scale(table.features.view())?,
        (None, None) => Standardiser::fit(table.features.view()).apply(table.features.view()),
    };
    let items = &table.items;
    let tagged: Vec<bool> = items.iter().map(|i| !i.tags.is_empty()).collect();
    let tagged_contents: HashSet<&str> = items
        .iter()
        .filter(|i| !i.tags.is_empty())
        .map(|i| i.content_hash.as_str())
        .collect();
    let excluded: Vec<bool> = items
        .iter()
        .map(|i| i.tags.is_empty() && tagged_contents.contains(i.content_hash.as_str()))
        .collect();
    let unit = unit_rows(scaled.view());
    let scores = match &queries {
        Some(q) => {
            let rows: Vec<usize> = (0..items.len()).filter(|&r| !tagged[r]).collect();
            let mut all = Array2::zeros((items.len(), q.vocabulary().len()));
            // Every record at once: looking each path up in the list file would read it
            // twenty times a picture.
            q.items().all()?;
            let asked: Vec<usize> = rows
                .iter()
                .map(|&r| q.row_of_rel_path(&items[r].rel_path))
                .filter_map(Result::transpose)
                .collect::<Result<_>>()?;
            if !asked.is_empty() {
                let some = q.suggest_rows(&asked)?;
                for (&r, row) in rows.iter().zip(some.outer_iter()) {
                    all.row_mut(r).assign(&row);
                }
            }
            Some(all)
        }
        None => None,
    };
    let pool = TaggingPool {
        unit: unit.view(),
        tagged: &tagged,
        excluded: &excluded,
        scores: scores.as_ref().map(|s| s.view()),
    };
    let vocabulary = queries.as_ref().map(|q| q.vocabulary()).unwrap_or_default();
    let pictures = choose_pictures_to_tag(&pool, strategy, count)
        .into_iter()
        .map(|pick| PictureToTag {
            picture: items[pick.row].rel_path.clone(),
            reason: match pick.reason {
                PickReason::Unlike { nearest } => ToTagReason::UnlikeTagged {
                    nearest_similarity: nearest,
                },
                PickReason::Unsure { best } => ToTagReason::ModelUnsure {
                    likeliest: best.map(|(c, _)| vocabulary.get(c).cloned().unwrap_or_default()),
                    scores: best.map(|(_, s)| s),
                },
            },
        })
        .collect();
    Ok(ToTagList {
        way: if queries.is_some() || !strategy.needs_scores() {
            strategy.name()
        } else {
            TaggingStrategy::Unlike.name()
        },
        trained,
        untagged: tagged.iter().filter(|&&t| !t).count(),
        pictures,
    })
}
