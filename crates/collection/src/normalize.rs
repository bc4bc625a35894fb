//! One spelling per tag, so "Café ", "café" and "CAFE\u{301}" count as the same word.

use unicode_normalization::UnicodeNormalization;

/// Invisible format characters that make two tags look identical while they differ; they
/// are dropped wherever they stand. A byte-order mark reaches a tag when an editor writes one
/// at the top of a sidecar or files are joined; the others come from pasted web text.
///
/// U+200D ZERO WIDTH JOINER and U+200C ZERO WIDTH NON-JOINER stay: they change what is shown
/// (emoji sequences such as U+1F468 U+200D U+1F469, cursive joining in Persian or Indic text).
// source: Unicode 15.0 Standard, chapter 23 "Special Areas and Format Characters" (23.2
// Layout Controls: ZWSP, WJ, SHY, ZWJ/ZWNJ; 23.8 Specials: U+FEFF as byte-order mark) and
// the Unicode Character Database names (UnicodeData.txt); section numbers from memory.
const INVISIBLE: [char; 4] = [
    '\u{FEFF}', // ZERO WIDTH NO-BREAK SPACE (byte-order mark)
    '\u{200B}', // ZERO WIDTH SPACE
    '\u{2060}', // WORD JOINER
    '\u{00AD}', // SOFT HYPHEN
];

/// Unicode NFC without the `INVISIBLE` characters, trimmed, lower-cased, inner whitespace runs
/// joined by a single `-`. `None` when nothing is left. Applying it twice changes nothing.
pub fn normalize_tag(raw: &str) -> Option<String> {
    // Invisibles go first, so marks on either side of one compose under NFC.
    let visible: String = raw.chars().filter(|c| !INVISIBLE.contains(c)).collect();
    // NFC again after lower-casing: case mapping can yield sequences that compose further.
    let lowered: String = visible
        .nfc()
        .collect::<String>()
        .to_lowercase()
        .nfc()
        .collect();
    let joined = lowered.split_whitespace().collect::<Vec<_>>().join("-");
    (!joined.is_empty()).then_some(joined)
}

/// The first character of `tag` that would make it show as something it is not, if any:
/// a bidirectional control (U+202E turns `gpj.exe` into what shows as "exe.jpg") or a
/// Unicode non-character (U+FDD0..U+FDEF, and the last two code points of every plane,
/// such as U+FFFE and U+FFFF), which no text should carry. Tags are refused with it, not
/// silently changed: a person should see what was there.
// source: Unicode Standard Annex #9 (UAX #9), Table 1 "Bidirectional Character Types":
// explicit formatting characters LRE/RLE/PDF/LRO/RLO (U+202A..U+202E), LRI/RLI/FSI/PDI
// (U+2066..U+2069), implicit marks LRM/RLM (U+200E, U+200F) and ALM (U+061C); Unicode
// Standard §23.7 "Noncharacters" (66 code points); section numbers from memory.
pub fn misleading_char(tag: &str) -> Option<char> {
    tag.chars().find(|&c| {
        let p = c as u32;
        matches!(p, 0x202A..=0x202E | 0x2066..=0x2069 | 0x200E | 0x200F | 0x061C)
            || (0xFDD0..=0xFDEF).contains(&p)
            || p & 0xFFFE == 0xFFFE
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn cps(points: &[u32]) -> String {
        points.iter().map(|&p| char::from_u32(p).unwrap()).collect()
    }

    #[test]
    fn tags_that_show_as_something_else_are_named() {
        assert_eq!(misleading_char("holiday"), None);
        assert_eq!(misleading_char("caf\u{e9} \u{200d} \u{1F468}"), None);
        assert_eq!(misleading_char("gpj.exe\u{202E}"), Some('\u{202E}'));
        for p in [
            0x202A, 0x202B, 0x202C, 0x202D, 0x202E, 0x2066, 0x2067, 0x2068, 0x2069, 0x200E, 0x200F,
            0x061C, 0xFDD0, 0xFDEF, 0xFFFE, 0xFFFF, 0x1FFFE, 0x10FFFF,
        ] {
            let c = char::from_u32(p).unwrap();
            assert_eq!(misleading_char(&format!("a{c}b")), Some(c), "U+{p:04X}");
        }
        // Neighbours of the ranges are ordinary characters.
        for p in [
            0x2029, 0x202F, 0x2065, 0x206A, 0xFDCF, 0xFDF0, 0xFFFD, 0x1FFFD,
        ] {
            let c = char::from_u32(p).unwrap();
            assert_eq!(misleading_char(&format!("a{c}b")), None, "U+{p:04X}");
        }
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

    #[test]
    fn invisible_format_characters_are_dropped_anywhere() {
        // source: Unicode Character Database (UnicodeData.txt) names and General_Category
        // Cf: U+FEFF ZERO WIDTH NO-BREAK SPACE, U+200B ZERO WIDTH SPACE, U+2060 WORD JOINER,
        // U+00AD SOFT HYPHEN; Unicode 15.0 Standard chapter 23 "Special Areas and Format
        // Characters" (23.2, 23.8). From memory.
        for invisible in [0xFEFF, 0x200B, 0x2060, 0xAD] {
            let c = cps(&[invisible]);
            for raw in [
                format!("{c}harbour"),
                format!("har{c}bour"),
                format!("harbour{c}"),
                format!("{c}{c}Harbour{c}"),
            ] {
                assert_eq!(
                    normalize_tag(&raw).as_deref(),
                    Some("harbour"),
                    "U+{invisible:04X} in {raw:?}"
                );
            }
            assert_eq!(normalize_tag(&c), None, "U+{invisible:04X} alone");
            assert_eq!(normalize_tag(&format!(" {c} ")), None);
            // Next to whitespace it leaves one separator, never two.
            assert_eq!(
                normalize_tag(&format!("old {c} town")).as_deref(),
                Some("old-town")
            );
        }
        // A byte-order mark between a letter and its combining mark no longer blocks NFC.
        assert_eq!(
            normalize_tag("Cafe\u{FEFF}\u{301}").as_deref(),
            Some("caf\u{e9}")
        );
    }

    #[test]
    fn joiners_that_change_what_is_shown_are_kept() {
        // source: Unicode 15.0 Standard chapter 23.2 (ZWJ/ZWNJ) and Unicode Technical
        // Standard #51, emoji-zwj-sequences.txt: U+1F468 U+200D U+1F469 U+200D U+1F467 is
        // "family: man, woman, girl". U+200C ZERO WIDTH NON-JOINER inside a Persian word
        // (U+0645 U+06CC U+200C U+062E U+0648 U+0631 U+0645, "I eat"); from memory.
        let family = cps(&[0x1F468, 0x200D, 0x1F469, 0x200D, 0x1F467]);
        assert_eq!(normalize_tag(&family), Some(family.clone()));
        let persian = cps(&[0x645, 0x6CC, 0x200C, 0x62E, 0x648, 0x631, 0x645]);
        assert_eq!(normalize_tag(&persian), Some(persian.clone()));
        assert_ne!(
            normalize_tag(&family),
            normalize_tag(&cps(&[0x1F468, 0x1F469, 0x1F467]))
        );
    }

    proptest! {
        #[test]
        fn idempotent_and_invisible_free_on_format_characters(
            raw in "[a-zA-Z \u{301}\u{AD}\u{200B}\u{200C}\u{200D}\u{2060}\u{FEFF}]{0,24}"
        ) {
            if let Some(once) = normalize_tag(&raw) {
                prop_assert_eq!(normalize_tag(&once), Some(once.clone()));
                prop_assert!(!once.contains(INVISIBLE), "{:?}", once);
                // The joiners are never dropped.
                let joiners = |s: &str| s.chars().filter(|c| matches!(c, '\u{200C}' | '\u{200D}')).count();
                prop_assert_eq!(joiners(&once), joiners(&raw));
            }
        }

        #[test]
        fn never_panics_and_is_idempotent(raw in any::<String>()) {
            if let Some(once) = normalize_tag(&raw) {
                prop_assert_eq!(normalize_tag(&once), Some(once.clone()));
                prop_assert!(!once.chars().any(char::is_whitespace));
                prop_assert!(!once.contains(INVISIBLE), "{:?}", once);
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
