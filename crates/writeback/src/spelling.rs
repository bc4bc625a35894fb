//! The collection's own spelling of each tag, so a tag written back reads like the ones the
//! cataloguer wrote (`Sea`, `naïve art`) rather than the index's normalised form (`sea`,
//! `naïve-art`).
//!
//! Counted over the sidecars of the collection: each picture counts once for each spelling
//! its sidecars hold (a text and an XMP sidecar of one picture, kept in step, are one use, not
//! two). The spelling used by most pictures wins; a tie goes to the smallest spelling in code
//! point order, so the choice never depends on the order of a crawl. Spellings that would be
//! refused when written (a control character, a character that shows as something it is not)
//! are not counted.

use std::collections::{BTreeMap, HashMap, HashSet};

use tagweave_collection::{misleading_char, normalize_tag};

/// Raw spellings seen per normalised tag, with the number of pictures using each.
#[derive(Debug, Default, Clone, PartialEq, Eq)]
pub struct Spellings {
    uses: HashMap<String, BTreeMap<String, usize>>,
}

impl Spellings {
    /// Counts the spellings of one picture (all its sidecars together).
    pub fn add_picture<'a>(&mut self, spellings: impl IntoIterator<Item = &'a str>) {
        let mut seen: HashSet<&str> = HashSet::new();
        for spelling in spellings {
            let spelling = spelling.trim();
            let writable =
                !spelling.chars().any(char::is_control) && misleading_char(spelling).is_none();
            if !writable || !seen.insert(spelling) {
                continue;
            }
            if let Some(normal) = normalize_tag(spelling) {
                *self
                    .uses
                    .entry(normal)
                    .or_default()
                    .entry(spelling.to_string())
                    .or_default() += 1;
            }
        }
    }

    /// The spelling most pictures use for the normalised tag `normal` (ties: the smallest in
    /// code point order), or `None` when no sidecar of the collection spells it.
    pub fn preferred(&self, normal: &str) -> Option<&str> {
        let uses = self.uses.get(normal)?;
        // BTreeMap iterates smallest first; `max_by_key` keeps the last maximum, so compare
        // counts and prefer the earlier spelling by reversing on ties.
        uses.iter()
            .max_by(|(a, ca), (b, cb)| ca.cmp(cb).then_with(|| b.cmp(a)))
            .map(|(spelling, _)| spelling.as_str())
    }

    /// The spelling to write for a tag a person accepted or typed as `typed`: the
    /// collection's own when it spells the tag at all (whatever case or spacing the sheet
    /// used), otherwise the person's typing, trimmed. `None` when `typed` is no tag.
    pub fn to_write(&self, typed: &str) -> Option<(String, String)> {
        let typed = typed.trim();
        let normal = normalize_tag(typed)?;
        let spelling = self.preferred(&normal).unwrap_or(typed).to_string();
        Some((normal, spelling))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn most_used_spelling_wins_and_ties_go_to_the_smallest() {
        let mut spellings = Spellings::default();
        spellings.add_picture(["Sea", "  Boats ", "naïve art"]);
        spellings.add_picture(["sea", "Boats"]);
        spellings.add_picture(["Sea", "SEA", "Sea"]);
        // Sea: 2 pictures, sea: 1, SEA: 1 (one picture's repeats count once).
        assert_eq!(spellings.preferred("sea"), Some("Sea"));
        assert_eq!(spellings.preferred("boats"), Some("Boats"));
        assert_eq!(spellings.preferred("naïve-art"), Some("naïve art"));
        assert_eq!(spellings.preferred("harbour"), None);

        let mut tie = Spellings::default();
        tie.add_picture(["sea"]);
        tie.add_picture(["Sea"]);
        tie.add_picture(["SEA"]);
        // by hand: "SEA" < "Sea" < "sea" in code point order (S = U+0053, e = U+0065).
        assert_eq!(tie.preferred("sea"), Some("SEA"));
        let mut reversed = Spellings::default();
        reversed.add_picture(["SEA"]);
        reversed.add_picture(["Sea"]);
        reversed.add_picture(["sea"]);
        assert_eq!(
            reversed, tie,
            "the order pictures are counted in does not matter"
        );
    }

    #[test]
    fn the_collection_spelling_wins_over_the_typed_one_for_known_tags() {
        let mut spellings = Spellings::default();
        spellings.add_picture(["naïve art", "Sea"]);
        let write = |typed: &str| spellings.to_write(typed);
        assert_eq!(write("sea"), Some(("sea".into(), "Sea".into())));
        assert_eq!(write(" SEA "), Some(("sea".into(), "Sea".into())));
        assert_eq!(
            write("naïve-art"),
            Some(("naïve-art".into(), "naïve art".into()))
        );
        // A tag the collection never spelled keeps the person's typing.
        assert_eq!(
            write(" Old Town "),
            Some(("old-town".into(), "Old Town".into()))
        );
        // `naive` without the diaeresis is another tag to the normaliser.
        assert_eq!(
            write("naive-art"),
            Some(("naive-art".into(), "naive-art".into()))
        );
        assert_eq!(write("   "), None);
    }

    #[test]
    fn spellings_that_could_not_be_written_are_not_counted() {
        let mut spellings = Spellings::default();
        spellings.add_picture(["Sea\u{202E}", "Sea\u{0007}"]);
        spellings.add_picture(["sea"]);
        assert_eq!(spellings.preferred("sea"), Some("sea"));
        for refused in ["Sea\u{202E}", "Sea\u{0007}"] {
            let normal = normalize_tag(refused).unwrap();
            assert_eq!(spellings.preferred(&normal), None, "{refused:?}");
        }
    }
}
