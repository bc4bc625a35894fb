//! Keywords from an XMP packet (ISO 16684-1): the items of the array in `dc:subject`, and
//! which of them tagweave's own property marks as suggestions a person accepted.
//!
//! Names are matched by namespace URI, never by prefix, because any prefix may be bound to
//! any URI. Nothing declared in a DTD is ever expanded: a packet with a DOCTYPE is refused,
//! and only the five predefined entities and character references are resolved.

use quick_xml::events::{BytesRef, BytesStart, Event};
use quick_xml::name::ResolveResult;
use quick_xml::NsReader;

use crate::error::CollectionError;
use crate::sidecar::{dedup_normalized, utf8_or_line_error, SidecarTags};

const DC: &[u8] = b"http://purl.org/dc/elements/1.1/";
const RDF: &[u8] = b"http://www.w3.org/1999/02/22-rdf-syntax-ns#";

/// The namespace of tagweave's own XMP properties. The `.invalid` top-level name is reserved
/// never to resolve (RFC 2606), so the URI can belong to no one else.
pub const TAGWEAVE_XMP_NAMESPACE: &str = "https://tagweave.invalid/xmp/1.0/";
/// The prefix written with [`TAGWEAVE_XMP_NAMESPACE`] (readers match the URI, not the prefix).
pub const TAGWEAVE_XMP_PREFIX: &str = "tagweave";
/// tagweave's property (an `rdf:Bag`, beside `dc:subject`) listing the keywords that were
/// suggestions a person accepted; every other keyword of `dc:subject` is a person's own.
pub const ACCEPTED_PROPERTY: &str = "acceptedSuggestions";

/// Where an open element sits relative to the keyword array.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Frame {
    /// `dc:subject`.
    Subject,
    /// tagweave's [`ACCEPTED_PROPERTY`].
    Accepted,
    /// `rdf:Bag` (or `rdf:Seq`/`rdf:Alt`, accepted although keywords should be a bag).
    Array,
    /// `rdf:li`: its text is a keyword, unless it carries an `rdf:value` (qualified form).
    Item,
    /// `rdf:Description` inside an item (the long form of a qualified value).
    ItemResource,
    Value,
    Other,
}

/// Text gathered for the `rdf:li` being read.
#[derive(Default)]
struct ItemText {
    direct: String,
    value: Option<String>,
}

/// Keywords of the packet, normalised and de-duplicated in document order.
pub fn parse_xmp(bytes: &[u8]) -> Result<Vec<String>, CollectionError> {
    parse_xmp_marked(bytes).map(|read| read.tags)
}

/// Keywords of the packet (as [`parse_xmp`]) and those of them that tagweave's
/// [`ACCEPTED_PROPERTY`] lists as accepted suggestions.
pub fn parse_xmp_marked(bytes: &[u8]) -> Result<SidecarTags, CollectionError> {
    let text = utf8_or_line_error(bytes)?;
    let mut parser = Parser {
        reader: NsReader::from_str(text.strip_prefix('\u{feff}').unwrap_or(text)),
        stack: Vec::new(),
        item: ItemText::default(),
        keywords: Vec::new(),
        marks: Vec::new(),
        root_closed: false,
    };
    loop {
        let event = parser
            .reader
            .read_event()
            .map_err(|e| parser.malformed(e))?;
        match event {
            Event::Start(start) => {
                let frame = parser.open(&start)?;
                parser.stack.push(frame);
            }
            Event::Empty(start) => {
                if parser.open(&start)? == Frame::Item {
                    parser.item_done();
                }
                parser.root_closed |= parser.stack.is_empty();
            }
            Event::End(_) => {
                if parser.stack.pop() == Some(Frame::Item) {
                    parser.item_done();
                }
                parser.root_closed |= parser.stack.is_empty();
            }
            Event::Text(t) => {
                let decoded = t.xml10_content().map_err(|e| parser.malformed(e))?;
                parser.text(&decoded)?;
            }
            Event::CData(t) => {
                let decoded = t.xml10_content().map_err(|e| parser.malformed(e))?;
                parser.text(&decoded)?;
            }
            Event::GeneralRef(r) => {
                let resolved = parser.reference(&r)?;
                parser.text(&resolved)?;
            }
            Event::DocType(_) => return Err(CollectionError::XmlDoctype),
            Event::Decl(_) | Event::PI(_) | Event::Comment(_) => {}
            Event::Eof => break,
        }
    }
    if !parser.stack.is_empty() {
        return Err(parser.malformed("the packet ends inside an open element"));
    }
    if !parser.root_closed {
        return Err(parser.malformed("no element at all"));
    }
    let texts = |items: Vec<ItemText>| {
        dedup_normalized(items.into_iter().map(|k| k.value.unwrap_or(k.direct)))
    };
    let tags = texts(parser.keywords);
    let accepted = texts(parser.marks)
        .into_iter()
        .filter(|tag| tags.contains(tag))
        .collect();
    Ok(SidecarTags { tags, accepted })
}

struct Parser<'i> {
    reader: NsReader<&'i [u8]>,
    stack: Vec<Frame>,
    item: ItemText,
    keywords: Vec<ItemText>,
    /// Items of tagweave's list of accepted suggestions.
    marks: Vec<ItemText>,
    root_closed: bool,
}

impl Parser<'_> {
    /// Files the item just closed under the property it belongs to.
    fn item_done(&mut self) {
        let item = std::mem::take(&mut self.item);
        let in_marks = self.stack.contains(&Frame::Accepted);
        if in_marks {
            self.marks.push(item);
        } else {
            self.keywords.push(item);
        }
    }

    /// Checks a start (or empty) tag and says what it is; the caller decides whether to push it.
    fn open(&mut self, start: &BytesStart) -> Result<Frame, CollectionError> {
        if self.root_closed && self.stack.is_empty() {
            return Err(self.malformed("a second top-level element"));
        }
        let mut rdf_value = None;
        for attr in start.attributes() {
            let attr = attr.map_err(|e| self.malformed(e))?;
            let (ns, local) = self.reader.resolve_attribute(attr.key);
            if self.namespace(ns)? == Some(RDF) && local.as_ref() == b"value" {
                rdf_value = Some(
                    attr.unescape_value()
                        .map_err(|e| self.malformed(e))?
                        .into_owned(),
                );
            }
        }
        let (ns, local) = self.reader.resolve_element(start.name());
        let frame = classify(
            self.stack.last().copied(),
            self.namespace(ns)?,
            local.as_ref(),
        );
        match frame {
            Frame::Item => self.item = ItemText::default(),
            Frame::Value => {
                self.item.value.get_or_insert_with(String::new);
            }
            _ => {}
        }
        if matches!(frame, Frame::Item | Frame::ItemResource) && rdf_value.is_some() {
            self.item.value = rdf_value;
        }
        Ok(frame)
    }

    fn text(&mut self, text: &str) -> Result<(), CollectionError> {
        match self.stack.last() {
            Some(Frame::Item) => self.item.direct.push_str(text),
            Some(Frame::Value) => self
                .item
                .value
                .get_or_insert_with(String::new)
                .push_str(text),
            None if !text.trim().is_empty() => {
                return Err(self.malformed("text outside the top-level element"))
            }
            _ => {}
        }
        Ok(())
    }

    /// Only the predefined entities and character references; anything else would need a DTD.
    fn reference(&self, r: &BytesRef) -> Result<String, CollectionError> {
        if let Some(ch) = r.resolve_char_ref().map_err(|e| self.malformed(e))? {
            return Ok(ch.to_string());
        }
        let name = r.decode().map_err(|e| self.malformed(e))?;
        quick_xml::escape::resolve_xml_entity(&name)
            .map(str::to_string)
            .ok_or_else(|| self.malformed(format!("undeclared entity &{name};")))
    }

    /// The namespace URI of a name, or an error for a prefix that was never declared.
    fn namespace<'n>(&self, ns: ResolveResult<'n>) -> Result<Option<&'n [u8]>, CollectionError> {
        match ns {
            ResolveResult::Bound(n) => Ok(Some(n.into_inner())),
            ResolveResult::Unbound => Ok(None),
            ResolveResult::Unknown(prefix) => Err(self.malformed(format!(
                "prefix `{}` is used but never declared",
                String::from_utf8_lossy(&prefix)
            ))),
        }
    }

    fn malformed(&self, problem: impl std::fmt::Display) -> CollectionError {
        CollectionError::XmlMalformed {
            problem: format!("{problem}, near byte {}", self.reader.buffer_position()),
        }
    }
}

fn classify(parent: Option<Frame>, ns: Option<&[u8]>, local: &[u8]) -> Frame {
    match (parent, ns, local) {
        (_, Some(DC), b"subject") => Frame::Subject,
        (_, Some(ns), local)
            if ns == TAGWEAVE_XMP_NAMESPACE.as_bytes() && local == ACCEPTED_PROPERTY.as_bytes() =>
        {
            Frame::Accepted
        }
        (Some(Frame::Subject | Frame::Accepted), Some(RDF), b"Bag" | b"Seq" | b"Alt") => {
            Frame::Array
        }
        (Some(Frame::Array), Some(RDF), b"li") => Frame::Item,
        (Some(Frame::Item), Some(RDF), b"Description") => Frame::ItemResource,
        (Some(Frame::Item | Frame::ItemResource), Some(RDF), b"value") => Frame::Value,
        _ => Frame::Other,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Laid out after the serialisation example of the XMP specification: Adobe XMP
    /// Specification Part 1 (2012) / ISO 16684-1, section 7 "XMP serialization" — packet
    /// wrapper (7.3), x:xmpmeta > rdf:RDF > rdf:Description (7.4–7.5), an unordered array as
    /// rdf:Bag with rdf:li items (7.7). Section numbers are from memory; the structure and
    /// the fixed xpacket id are as printed in the specification. The `begin` attribute holds
    /// an invisible U+FEFF, as the specification requires.
    const SPEC_PACKET: &str = r#"<?xpacket begin="﻿" id="W5M0MpCehiHzreSzNTczkc9d"?>
<x:xmpmeta xmlns:x="adobe:ns:meta/">
  <rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
    <rdf:Description rdf:about="" xmlns:dc="http://purl.org/dc/elements/1.1/">
      <dc:subject>
        <rdf:Bag>
          <rdf:li>Harbour</rdf:li>
          <rdf:li>fishing  boats</rdf:li>
          <rdf:li>harbour</rdf:li>
        </rdf:Bag>
      </dc:subject>
    </rdf:Description>
  </rdf:RDF>
</x:xmpmeta>
<?xpacket end="w"?>"#;

    fn keywords(packet: &str) -> Vec<String> {
        parse_xmp(packet.as_bytes()).unwrap()
    }

    fn problem(packet: &str) -> String {
        match parse_xmp(packet.as_bytes()) {
            Err(CollectionError::XmlMalformed { problem }) => problem,
            other => panic!("expected a well-formedness error, got {other:?}"),
        }
    }

    #[test]
    fn reads_the_specification_layout() {
        assert_eq!(keywords(SPEC_PACKET), ["harbour", "fishing-boats"]);
    }

    #[test]
    fn accepted_suggestions_are_read_by_namespace_and_stay_keywords() {
        // Any prefix may be bound to the namespace; a mark for a keyword that dc:subject does
        // not carry marks nothing.
        let packet = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
            xmlns:dc="http://purl.org/dc/elements/1.1/"
            xmlns:tw2="https://tagweave.invalid/xmp/1.0/">
          <rdf:Description rdf:about="">
            <dc:subject><rdf:Bag><rdf:li>Harbour</rdf:li><rdf:li>Sea</rdf:li></rdf:Bag></dc:subject>
            <tw2:acceptedSuggestions><rdf:Bag><rdf:li>sea</rdf:li><rdf:li>fog</rdf:li>
            </rdf:Bag></tw2:acceptedSuggestions>
          </rdf:Description></rdf:RDF>"#;
        let read = parse_xmp_marked(packet.as_bytes()).unwrap();
        assert_eq!(read.tags, ["harbour", "sea"]);
        assert_eq!(read.accepted, ["sea"]);
        assert_eq!(keywords(packet), read.tags);
        // The same local name in another namespace is not ours.
        let foreign = packet.replace("https://tagweave.invalid/xmp/1.0/", "urn:other:1");
        assert!(parse_xmp_marked(foreign.as_bytes())
            .unwrap()
            .accepted
            .is_empty());
        assert!(parse_xmp_marked(SPEC_PACKET.as_bytes())
            .unwrap()
            .accepted
            .is_empty());
    }

    #[test]
    fn wrapper_and_xmpmeta_are_optional() {
        let bare = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
            xmlns:dc="http://purl.org/dc/elements/1.1/">
          <rdf:Description rdf:about=""><dc:subject><rdf:Bag>
            <rdf:li>kelp</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"#;
        assert_eq!(keywords(bare), ["kelp"]);
    }

    #[test]
    fn matches_namespace_uris_not_prefixes() {
        let other_prefixes = r#"<x:xmpmeta xmlns:x="adobe:ns:meta/">
          <r:RDF xmlns:r="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
            <r:Description xmlns:d="http://purl.org/dc/elements/1.1/">
              <d:subject><r:Bag><r:li>pier</r:li></r:Bag></d:subject>
            </r:Description>
            <r:Description>
              <subject xmlns="http://purl.org/dc/elements/1.1/"><r:Bag><r:li>gull</r:li></r:Bag></subject>
            </r:Description>
          </r:RDF></x:xmpmeta>"#;
        assert_eq!(keywords(other_prefixes), ["pier", "gull"]);
    }

    #[test]
    fn decoy_dc_prefix_on_another_uri_is_ignored() {
        let decoy = r#"<x:xmpmeta xmlns:x="adobe:ns:meta/">
          <rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
            <rdf:Description xmlns:dc="http://example.org/not-dublin-core/">
              <dc:subject><rdf:Bag><rdf:li>decoy</rdf:li></rdf:Bag></dc:subject>
            </rdf:Description>
            <rdf:Description xmlns:real="http://purl.org/dc/elements/1.1/">
              <real:subject><rdf:Bag><rdf:li>genuine</rdf:li></rdf:Bag></real:subject>
            </rdf:Description>
          </rdf:RDF></x:xmpmeta>"#;
        assert_eq!(keywords(decoy), ["genuine"]);
    }

    #[test]
    fn other_schemas_do_not_leak_into_keywords() {
        let busy = r#"<x:xmpmeta xmlns:x="adobe:ns:meta/">
          <rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
            <rdf:Description rdf:about=""
                xmlns:xmp="http://ns.adobe.com/xap/1.0/"
                xmlns:photoshop="http://ns.adobe.com/photoshop/1.0/"
                xmlns:Iptc4xmpCore="http://iptc.org/std/Iptc4xmpCore/1.0/xmlns/"
                xmlns:dc="http://purl.org/dc/elements/1.1/"
                xmp:CreateDate="2021-06-01T10:00:00Z"
                photoshop:City="Leith">
              <photoshop:Headline>Morning catch</photoshop:Headline>
              <Iptc4xmpCore:Location>North quay</Iptc4xmpCore:Location>
              <dc:title><rdf:Alt><rdf:li xml:lang="x-default">Boats at dawn</rdf:li></rdf:Alt></dc:title>
              <dc:creator><rdf:Seq><rdf:li>A. Keeper</rdf:li></rdf:Seq></dc:creator>
              <dc:subject><rdf:Bag><rdf:li>Trawler</rdf:li><rdf:li>Dawn</rdf:li></rdf:Bag></dc:subject>
            </rdf:Description>
          </rdf:RDF></x:xmpmeta>"#;
        assert_eq!(keywords(busy), ["trawler", "dawn"]);
    }

    #[test]
    fn seq_alt_language_and_qualified_items() {
        let varied = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
            xmlns:dc="http://purl.org/dc/elements/1.1/" xmlns:q="http://example.org/qualifiers/">
          <rdf:Description><dc:subject><rdf:Seq>
            <rdf:li xml:lang="fr">Phare</rdf:li>
            <rdf:li rdf:parseType="Resource"><rdf:value>Rock &amp; Roll</rdf:value><q:source>x</q:source></rdf:li>
            <rdf:li rdf:value="lighthouse keeper" q:source="y"/>
            <rdf:li><rdf:Description><rdf:value>caf&#xE9;</rdf:value><q:source>z</q:source></rdf:Description></rdf:li>
            <rdf:li><![CDATA[<storm>]]></rdf:li>
          </rdf:Seq></dc:subject></rdf:Description>
          <rdf:Description><dc:subject><rdf:Alt><rdf:li>fog</rdf:li></rdf:Alt></dc:subject></rdf:Description>
        </rdf:RDF>"#;
        assert_eq!(
            keywords(varied),
            [
                "phare",
                "rock-&-roll",
                "lighthouse-keeper",
                "caf\u{e9}",
                "<storm>",
                "fog"
            ]
        );
    }

    #[test]
    fn byte_order_marks_and_invisibles_do_not_split_a_keyword() {
        // A BOM before the packet (file level) and U+FEFF / U+200B inside items, written
        // raw and as character references, all read as the one keyword.
        // source: Unicode Character Database names: U+FEFF ZERO WIDTH NO-BREAK SPACE,
        // U+200B ZERO WIDTH SPACE (from memory).
        let packet = "\u{feff}<rdf:RDF xmlns:rdf=\"http://www.w3.org/1999/02/22-rdf-syntax-ns#\" \
            xmlns:dc=\"http://purl.org/dc/elements/1.1/\"><rdf:Description><dc:subject><rdf:Bag>\
            <rdf:li>\u{feff}Harbour</rdf:li><rdf:li>harbour</rdf:li><rdf:li>&#xFEFF;harbour</rdf:li>\
            <rdf:li>har&#x200B;bour</rdf:li><rdf:li>gull</rdf:li>\
            </rdf:Bag></dc:subject></rdf:Description></rdf:RDF>";
        assert_eq!(keywords(packet), ["harbour", "gull"]);
    }

    #[test]
    fn entity_bomb_is_refused_not_expanded() {
        // The classic exponential entity expansion; refused at the DOCTYPE.
        let bomb = r#"<?xml version="1.0"?>
<!DOCTYPE lolz [
 <!ENTITY lol "lol">
 <!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
 <!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">
 <!ENTITY lol4 "&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;">
]>
<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#" xmlns:dc="http://purl.org/dc/elements/1.1/">
 <rdf:Description><dc:subject><rdf:Bag><rdf:li>&lol4;</rdf:li></rdf:Bag></dc:subject></rdf:Description>
</rdf:RDF>"#;
        assert!(matches!(
            parse_xmp(bomb.as_bytes()),
            Err(CollectionError::XmlDoctype)
        ));
    }

    #[test]
    fn external_entity_is_never_fetched() {
        let dir = tempfile::tempdir().unwrap();
        let secret_file = dir.path().join("secret");
        std::fs::write(&secret_file, "s3cr3t-value").unwrap();
        let body = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#" xmlns:dc="http://purl.org/dc/elements/1.1/">
 <rdf:Description><dc:subject><rdf:Bag><rdf:li>&xxe;</rdf:li></rdf:Bag></dc:subject></rdf:Description>
</rdf:RDF>"#;
        let with_dtd = format!(
            "<!DOCTYPE r [<!ENTITY xxe SYSTEM \"file://{}\">]>\n{body}",
            secret_file.display()
        );
        for packet in [with_dtd.as_str(), body] {
            let result = parse_xmp(packet.as_bytes());
            assert!(result.is_err(), "{result:?}");
            assert!(!format!("{result:?}").contains("s3cr3t"));
        }
        assert!(problem(body).contains("&xxe;"));
    }

    #[test]
    fn not_well_formed_is_an_error_naming_the_problem() {
        const HEAD: &str = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">"#;
        assert!(problem(&format!("{HEAD}<rdf:Bag></rdf:Seq></rdf:RDF>")).contains("rdf:Bag"));
        assert!(problem(&format!("{HEAD}<rdf:Bag>")).contains("open element"));
        assert!(problem("<dc:subject>x</dc:subject>").contains("`dc`"));
        assert!(problem(&format!("{HEAD}</rdf:RDF><second/>")).contains("second top-level"));
        assert!(problem("stray text").contains("outside"));
        assert!(problem("").contains("no element"));
        assert!(!problem(&format!("{HEAD}<a x='1' x='2'/></rdf:RDF>")).is_empty());
        assert!(!problem(&format!("{HEAD}<a>AT&T</a></rdf:RDF>")).is_empty());
    }

    #[test]
    fn non_utf8_packet_is_an_error() {
        let mut bytes = SPEC_PACKET.as_bytes().to_vec();
        let at = SPEC_PACKET.find("Harbour").unwrap();
        bytes[at] = 0xFF;
        let line = 1 + SPEC_PACKET[..at].matches('\n').count();
        assert!(
            matches!(parse_xmp(&bytes), Err(CollectionError::NotUtf8 { line: l }) if l == line)
        );
    }

    proptest! {
        #[test]
        fn never_panics_on_arbitrary_bytes(bytes in proptest::collection::vec(any::<u8>(), 0..512)) {
            let _ = parse_xmp(&bytes);
        }

        #[test]
        fn never_panics_on_damaged_packets(cut in 0..SPEC_PACKET.len(), junk in "[<>&;/\"'=a-z: ]{0,8}") {
            let mut damaged = SPEC_PACKET.as_bytes()[..cut].to_vec();
            damaged.extend_from_slice(junk.as_bytes());
            damaged.extend_from_slice(&SPEC_PACKET.as_bytes()[cut..]);
            let _ = parse_xmp(&damaged);
        }
    }
}
