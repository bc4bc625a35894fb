//! The tags a trained suggester knows, each with its score column.

use std::collections::{BTreeSet, HashMap};

/// Tag names known to the suggester, sorted, each with its column index.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TagColumns {
    tags: Vec<String>,
    index: HashMap<String, usize>,
}

impl TagColumns {
    /// Every distinct tag of the given items (pass training items only).
    pub fn from_items<'a>(items: impl IntoIterator<Item = &'a [String]>) -> Self {
        let set: BTreeSet<&String> = items.into_iter().flatten().collect();
        let tags: Vec<String> = set.into_iter().cloned().collect();
        let index = tags
            .iter()
            .enumerate()
            .map(|(i, t)| (t.clone(), i))
            .collect();
        TagColumns { tags, index }
    }

    pub fn len(&self) -> usize {
        self.tags.len()
    }

    pub fn is_empty(&self) -> bool {
        self.tags.is_empty()
    }

    pub fn tags(&self) -> &[String] {
        &self.tags
    }

    pub fn index_of(&self, tag: &str) -> Option<usize> {
        self.index.get(tag).copied()
    }

    /// Known tags as sorted, de-duplicated column indices; unknown tags are dropped.
    pub fn encode(&self, tags: &[String]) -> Vec<usize> {
        let set: BTreeSet<usize> = tags.iter().filter_map(|t| self.index_of(t)).collect();
        set.into_iter().collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn strings(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn columns_are_sorted_and_unknown_tags_dropped() {
        let items = [strings(&["sea", "boat"]), strings(&["boat", "dusk"])];
        let v = TagColumns::from_items(items.iter().map(|t| t.as_slice()));
        assert_eq!(v.tags(), &strings(&["boat", "dusk", "sea"])[..]);
        assert_eq!(
            v.encode(&strings(&["sea", "fog", "boat", "sea"])),
            vec![0, 2]
        );
        assert_eq!((v.index_of("dusk"), v.index_of("fog")), (Some(1), None));
    }
}
