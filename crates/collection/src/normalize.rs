//! One spelling per tag, so "Café ", "café" and "CAFE\u{301}" count as the same word.

use unicode_normalization::UnicodeNormalization;

/// Unicode NFC, trimmed, lower-cased, inner whitespace runs joined by a single `-`.
/// `None` when nothing is left. Applying it twice changes nothing.
pub fn normalize_tag(raw: &str) -> Option<String> {
    // NFC again after lower-casing: case mapping can yield sequences that compose further.
    let lowered: String = raw.nfc().collect::<String>().to_lowercase().nfc().collect();
    let joined = lowered.split_whitespace().collect::<Vec<_>>().join("-");
    (!joined.is_empty()).then_some(joined)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn cps(points: &[u32]) -> String {
        points.iter().map(|&p| char::from_u32(p).unwrap()).collect()
    }

    #[test]
    fn composed_and_decomposed_cafe_are_one_tag() {
        // source: UAX #15 (Unicode Normalization Forms), canonical equivalence of
        // U+00E9 and U+0065 U+0301 — the standard's introductory example.
        let composed = "Caf\u{e9}";
        let decomposed = "Cafe\u{301}";
        assert_ne!(composed, decomposed);
        assert_eq!(normalize_tag(composed), Some("caf\u{e9}".to_string()));
        assert_eq!(normalize_tag(decomposed), normalize_tag(composed));
    }

    #[test]
    fn normalization_test_rows() {
        // source: Unicode NormalizationTest.txt, Part0 rows (unchanged across versions):
        //   1E0A;1E0A;0044 0307;1E0A;0044 0307;  (D WITH DOT ABOVE)
        //   1E0C;1E0C;0044 0323;1E0C;0044 0323;  (D WITH DOT BELOW)
        // and Part1 row 00C5;00C5;0041 030A;00C5;0041 030A; (A WITH RING ABOVE).
        // Columns are source;NFC;NFD; the tag is NFC then lower-cased.
        for (nfd, nfc) in [
            (&[0x44, 0x307][..], 0x1E0A),
            (&[0x44, 0x323][..], 0x1E0C),
            (&[0x41, 0x30A][..], 0xC5),
        ] {
            let expected: String = cps(&[nfc]).to_lowercase();
            assert_eq!(normalize_tag(&cps(nfd)).as_deref(), Some(expected.as_str()));
            assert_eq!(
                normalize_tag(&cps(&[nfc])).as_deref(),
                Some(expected.as_str())
            );
        }
        // source: NormalizationTest.txt Part0, from memory:
        //   0044 0307 0323;1E0C 0307;0044 0323 0307;1E0C 0307;0044 0323 0307;
        // canonical reordering puts the dot below (ccc 220) before the dot above (ccc 230).
        assert_eq!(
            normalize_tag(&cps(&[0x44, 0x307, 0x323])),
            Some(cps(&[0x1E0D, 0x307]))
        );
        // source: NormalizationTest.txt Part1 row FF21;FF21;FF21;0041;0041; —
        // NFC keeps the fullwidth letter (only NFKC folds it), so the tag keeps it too.
        assert_eq!(normalize_tag("\u{FF21}"), Some("\u{FF41}".to_string()));
    }

    #[test]
    fn trims_lowercases_and_joins_whitespace() {
        assert_eq!(normalize_tag("  Old Town \t"), Some("old-town".into()));
        assert_eq!(
            normalize_tag("a \t\u{a0}\u{3000} b  c"),
            Some("a-b-c".into())
        );
        assert_eq!(normalize_tag("ÉTÉ"), Some("été".into()));
        // Final sigma: Rust follows the Unicode SpecialCasing context rule.
        assert_eq!(
            normalize_tag("ΣΟΦΟΣ"),
            Some("\u{3c3}\u{3bf}\u{3c6}\u{3bf}\u{3c2}".into())
        );
        assert_eq!(normalize_tag("   "), None);
        assert_eq!(normalize_tag(""), None);
    }

    proptest! {
        #[test]
        fn never_panics_and_is_idempotent(raw in any::<String>()) {
            if let Some(once) = normalize_tag(&raw) {
                prop_assert_eq!(normalize_tag(&once), Some(once.clone()));
                prop_assert!(!once.chars().any(char::is_whitespace));
            }
        }

        #[test]
        fn idempotent_on_combining_heavy_text(raw in "[a-zA-ZÀ-ÿΑ-ωİı \u{300}-\u{36f}\u{1e00}-\u{1eff}]{0,24}") {
            if let Some(once) = normalize_tag(&raw) {
                prop_assert_eq!(normalize_tag(&once), Some(once.clone()));
            }
        }
    }
}
