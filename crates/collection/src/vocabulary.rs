//! How often each tag is used across the collection.

use std::collections::{HashMap, HashSet};

/// Tags with the number of pictures carrying each, most used first (ties by tag, so the
/// order is the same on every run).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Vocabulary {
    entries: Vec<(String, usize)>,
}

impl Vocabulary {
    /// Counts each tag at most once per list: a count is a number of pictures.
    pub fn from_tag_lists<'a>(lists: impl IntoIterator<Item = &'a [String]>) -> Vocabulary {
        let mut counts: HashMap<&'a str, usize> = HashMap::new();
        for list in lists {
            let unique: HashSet<&str> = list.iter().map(String::as_str).collect();
            for tag in unique {
                *counts.entry(tag).or_default() += 1;
            }
        }
        let mut entries: Vec<(String, usize)> = counts
            .into_iter()
            .map(|(tag, n)| (tag.to_string(), n))
            .collect();
        entries.sort_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(&b.0)));
        Vocabulary { entries }
    }

    pub fn entries(&self) -> &[(String, usize)] {
        &self.entries
    }

    pub fn len(&self) -> usize {
        self.entries.len()
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn list(tags: &[&str]) -> Vec<String> {
        tags.iter().map(|t| t.to_string()).collect()
    }

    #[test]
    fn counts_pictures_and_sorts_by_count_then_tag() {
        let lists = [
            list(&["harbour", "boat", "boat"]),
            list(&["boat", "dusk"]),
            list(&["anchor", "harbour"]),
            list(&[]),
        ];
        let vocab = Vocabulary::from_tag_lists(lists.iter().map(Vec::as_slice));
        let expected = [("boat", 2), ("harbour", 2), ("anchor", 1), ("dusk", 1)];
        let got: Vec<(&str, usize)> = vocab
            .entries()
            .iter()
            .map(|(t, n)| (t.as_str(), *n))
            .collect();
        assert_eq!(got, expected);
        assert_eq!(vocab.len(), 4);
        assert!(Vocabulary::from_tag_lists(std::iter::empty()).is_empty());
    }
}
