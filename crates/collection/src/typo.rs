//! The known tag a mistyped one was probably meant to be.

use crate::normalize_tag;

/// The tag of `known` nearest to `typed` (both compared normalised) by edit distance, when
/// it is near enough to be a slip of the keyboard: at most 1 edit for words of up to 4
/// letters, 2 up to 8, 3 beyond. An edit is one letter inserted, deleted, replaced, or two
/// neighbours swapped ("nigth" → "night" is one). Ties go to the first in `known`, so
/// callers list the most used tags first. `None` when nothing is that near, or when
/// `typed` is itself known.
pub fn closest_tag<'a>(typed: &str, known: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let typed: Vec<char> = normalize_tag(typed)?.chars().collect();
    let limit = match typed.len() {
        0..=4 => 1,
        5..=8 => 2,
        _ => 3,
    };
    let mut best: Option<(usize, &'a str)> = None;
    for tag in known {
        let candidate: Vec<char> = tag.chars().collect();
        if candidate.len().abs_diff(typed.len()) > limit {
            continue;
        }
        let distance = edit_distance(&typed, &candidate);
        if distance == 0 {
            return None;
        }
        if distance <= limit && best.is_none_or(|(d, _)| distance < d) {
            best = Some((distance, tag));
        }
    }
    best.map(|(_, tag)| tag)
}

/// Edits (insert, delete, replace, swap of two neighbours) turning `a` into `b`: the
/// "optimal string alignment" distance, a dynamic programme over prefixes.
fn edit_distance(a: &[char], b: &[char]) -> usize {
    // rows[i][j]: edits between a[..i] and b[..j]
    let mut rows = vec![vec![0usize; b.len() + 1]; a.len() + 1];
    for (i, row) in rows.iter_mut().enumerate() {
        row[0] = i;
    }
    for (j, cell) in rows[0].iter_mut().enumerate() {
        *cell = j;
    }
    for i in 1..=a.len() {
        for j in 1..=b.len() {
            let replace = usize::from(a[i - 1] != b[j - 1]);
            let mut d = (rows[i - 1][j] + 1)
                .min(rows[i][j - 1] + 1)
                .min(rows[i - 1][j - 1] + replace);
            if i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1] {
                d = d.min(rows[i - 2][j - 2] + 1);
            }
            rows[i][j] = d;
        }
    }
    rows[a.len()][b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chars(s: &str) -> Vec<char> {
        s.chars().collect()
    }

    #[test]
    fn edit_distances_worked_by_hand() {
        // source: from memory, the textbook examples: kitten → sitting is 3 (two
        // replacements, one insertion); a swap of neighbours counts once here.
        assert_eq!(edit_distance(&chars("kitten"), &chars("sitting")), 3);
        assert_eq!(edit_distance(&chars("nigth"), &chars("night")), 1);
        assert_eq!(edit_distance(&chars("clifs"), &chars("cliffs")), 1);
        assert_eq!(edit_distance(&chars(""), &chars("sea")), 3);
        assert_eq!(edit_distance(&chars("sea"), &chars("sea")), 0);
        assert_eq!(edit_distance(&chars("naïve"), &chars("naive")), 1);
    }

    #[test]
    fn the_nearest_known_tag_when_near_enough() {
        let known = ["night", "harbour", "cliffs", "sea", "snow"];
        assert_eq!(closest_tag("nigth", known), Some("night"));
        assert_eq!(closest_tag("Clifs", known), Some("cliffs"));
        assert_eq!(closest_tag("harbor", known), Some("harbour"));
        assert_eq!(closest_tag("night", known), None, "known already");
        assert_eq!(closest_tag("lighthouse", known), None, "nothing near");
        assert_eq!(
            closest_tag("sky", known),
            None,
            "two edits from sea: too far for 3 letters"
        );
        // a tie goes to the first listed (the most used)
        assert_eq!(closest_tag("sno", ["sea", "snow", "sun"]), Some("snow"));
        assert_eq!(closest_tag("sn", ["so", "sun"]), Some("so"));
        assert_eq!(closest_tag("   ", known), None);
    }
}
