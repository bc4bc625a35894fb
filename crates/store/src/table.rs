//! Every item's feature vector as the rows of one matrix.

use ndarray::Array2;
use tagweave_collection::ItemRecord;

use crate::{Result, Store, StoreError, FEATURES};

/// Every item that has a feature vector, with those vectors as the rows of one matrix
/// (raw, not standardised), ordered by relative path.
pub struct FeatureTable {
    pub items: Vec<ItemRecord>,
    pub features: Array2<f32>,
}

impl FeatureTable {
    pub fn load(store: &Store) -> Result<FeatureTable> {
        FeatureTable::load_where(store, |_| true)
    }

    /// Like [`Self::load`], for the items `keep` accepts only (training reads the tagged
    /// pictures only: at a million pictures, all of them would not fit in memory as `f32`).
    pub fn load_where(store: &Store, keep: impl Fn(&ItemRecord) -> bool) -> Result<FeatureTable> {
        let mut items = store.items()?;
        items.retain(|item| keep(item));
        items.sort_by(|a, b| a.rel_path.cmp(&b.rel_path));
        let mut kept = Vec::with_capacity(items.len());
        let mut values = Vec::new();
        let mut dimension = None;
        let features = store.vector_reader(FEATURES)?;
        for item in items {
            let Some(row) = features.get(&item.id)? else {
                continue;
            };
            if *dimension.get_or_insert(row.len()) != row.len() {
                return Err(StoreError::Inconsistent(format!(
                    "feature vectors of different lengths ({} has {}); rebuild features with \
                     `tagweave scan FOLDER --relearn`",
                    item.rel_path,
                    row.len()
                )));
            }
            values.extend_from_slice(&row);
            kept.push(item);
        }
        let features = Array2::from_shape_vec((kept.len(), dimension.unwrap_or(0)), values)
            .map_err(|e| StoreError::Inconsistent(e.to_string()))?;
        Ok(FeatureTable {
            items: kept,
            features,
        })
    }

    /// The tags of each row's item.
    pub fn tags(&self) -> Vec<&[String]> {
        self.items.iter().map(|i| i.tags.as_slice()).collect()
    }

    /// The content key (hash of the picture's bytes) of each row's item.
    pub fn content_keys(&self) -> Vec<&str> {
        self.items.iter().map(|i| i.content_hash.as_str()).collect()
    }
}
