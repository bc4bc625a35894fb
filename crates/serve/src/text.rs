//! The small text codecs a web page needs: HTML escaping, URL query and form decoding,
//! and percent-encoding for links. Written here because each is a few lines and the
//! review page must not trust any of its inputs.

use tagweave_collection::misleading_char;

/// Escapes text for HTML element content and quoted attribute values. A character that
/// would make text show as something it is not (a bidirectional control, a non-character;
/// see [`misleading_char`]) is shown as its code, `[U+202E]`, so a tag read from a sidecar
/// never displays as another.
pub fn html(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    let mut one = [0u8; 4];
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if misleading_char(c.encode_utf8(&mut one)).is_some() => {
                out.push_str(&format!("[U+{:04X}]", c as u32))
            }
            c => out.push(c),
        }
    }
    out
}

/// Percent-encodes a value for a URL query (`application/x-www-form-urlencoded`): every
/// byte but ASCII letters, digits and `-._~` is escaped, space as `+`.
pub fn url_component(value: &str) -> String {
    let mut out = String::with_capacity(value.len());
    for &b in value.as_bytes() {
        match b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'-' | b'.' | b'_' | b'~' => {
                out.push(b as char)
            }
            b' ' => out.push('+'),
            b => out.push_str(&format!("%{b:02X}")),
        }
    }
    out
}

/// Decodes one `application/x-www-form-urlencoded` value: `+` is a space, `%XX` a byte.
/// A malformed escape is kept as it stands; bytes that are not UTF-8 are replaced, so a
/// hostile query can only ever make an odd string, never an error or a panic.
pub fn decode_component(raw: &str) -> String {
    let bytes = raw.as_bytes();
    let mut out = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        match bytes[i] {
            b'+' => out.push(b' '),
            b'%' => match (hex(bytes.get(i + 1)), hex(bytes.get(i + 2))) {
                (Some(h), Some(l)) => {
                    out.push(h * 16 + l);
                    i += 2;
                }
                _ => out.push(b'%'),
            },
            b => out.push(b),
        }
        i += 1;
    }
    String::from_utf8_lossy(&out).into_owned()
}

fn hex(b: Option<&u8>) -> Option<u8> {
    match b? {
        b @ b'0'..=b'9' => Some(b - b'0'),
        b @ b'a'..=b'f' => Some(b - b'a' + 10),
        b @ b'A'..=b'F' => Some(b - b'A' + 10),
        _ => None,
    }
}

/// `name=value` pairs of a query string or form body, decoded, in order.
pub fn pairs(encoded: &str) -> Vec<(String, String)> {
    encoded
        .split('&')
        .filter(|p| !p.is_empty())
        .map(|p| match p.split_once('=') {
            Some((k, v)) => (decode_component(k), decode_component(v)),
            None => (decode_component(p), String::new()),
        })
        .collect()
}

/// The first value of `name`, if any.
pub fn first<'a>(pairs: &'a [(String, String)], name: &str) -> Option<&'a str> {
    pairs
        .iter()
        .find(|(k, _)| k == name)
        .map(|(_, v)| v.as_str())
}

/// Tags typed into a box: separated by commas or whitespace, empties dropped.
pub fn tag_words(typed: &str) -> Vec<String> {
    typed
        .split(|c: char| c == ',' || c.is_whitespace())
        .filter(|w| !w.is_empty())
        .map(str::to_string)
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn html_escapes_the_five_special_characters() {
        // source: HTML Living Standard, "Serializing HTML fragments" escapes & < > and ",
        // plus ' for single-quoted attributes (common practice, OWASP XSS cheat sheet rule 1).
        assert_eq!(
            html(r#"<a href="x" title='y'>&</a>"#),
            "&lt;a href=&quot;x&quot; title=&#39;y&#39;&gt;&amp;&lt;/a&gt;"
        );
        assert_eq!(html("plain words"), "plain words");
    }

    #[test]
    fn characters_that_disguise_text_are_shown_as_codes() {
        // by hand: U+202E (RIGHT-TO-LEFT OVERRIDE) would show "gpj.exe" as "exe.jpg".
        assert_eq!(html("gpj.exe\u{202E}"), "gpj.exe[U+202E]");
        assert_eq!(html("a\u{FFFF}b\u{2066}"), "a[U+FFFF]b[U+2066]");
        assert_eq!(html("caf\u{e9}"), "caf\u{e9}");
    }

    #[test]
    fn form_values_decode_like_a_browser_sends_them() {
        // source: WHATWG URL Standard, application/x-www-form-urlencoded parser
        // ("+" → space, %XX → byte, then UTF-8 decode); worked by hand.
        assert_eq!(decode_component("night+harbour"), "night harbour");
        assert_eq!(decode_component("caf%C3%A9"), "café");
        assert_eq!(decode_component("%2e%2e%2F"), "../");
        assert_eq!(decode_component("100%"), "100%");
        assert_eq!(decode_component("%zz%4"), "%zz%4");
        assert_eq!(decode_component("%ff"), "\u{fffd}");
        let p = pairs("q=night+harbour&untagged=on&&empty=&bare");
        assert_eq!(first(&p, "q"), Some("night harbour"));
        assert_eq!(first(&p, "untagged"), Some("on"));
        assert_eq!(first(&p, "empty"), Some(""));
        assert_eq!(first(&p, "bare"), Some(""));
        assert_eq!(first(&p, "missing"), None);
    }

    #[test]
    fn encoding_then_decoding_gives_the_value_back() {
        for value in ["snow", "old town", "a&b=c", "café/été", "100% + 1", "~._-"] {
            assert_eq!(decode_component(&url_component(value)), value, "{value}");
        }
        assert_eq!(url_component("a b&c"), "a+b%26c");
    }

    #[test]
    fn typed_tags_split_on_commas_and_spaces() {
        assert_eq!(
            tag_words(" night, harbour  snow,,"),
            vec!["night", "harbour", "snow"]
        );
        assert!(tag_words(" , ").is_empty());
    }
}
