//! Editing the keywords of an XMP packet (`dc:subject`, an `rdf:Bag` of `rdf:li`) by splicing
//! bytes: new items go in, removed items come out, every other byte stays where it was.
//! Accepted suggestions also go into tagweave's own bag beside it
//! (`sidecar::ACCEPTED_PROPERTY`), which is edited the same way.
//!
//! Names are matched by namespace URI, as the collection's reader does. Forms this module does
//! not edit are refused with a reason, never rewritten: a packet marked read-only, a
//! `dc:subject` that is self-closing, carries attributes, holds text or an `rdf:Alt`, a
//! `dc:subject` given as an attribute, a packet without `rdf:RDF`/`rdf:Description`. Items in
//! qualified form (`rdf:value`, child elements) are never touched; asking to remove one makes
//! the caller's read-back check fail, which refuses the edit.

use std::collections::HashSet;
use std::ops::Range;

use quick_xml::events::{BytesStart, Event};
use quick_xml::name::{PrefixDeclaration, ResolveResult};
use quick_xml::NsReader;
use tagweave_collection::normalize_tag;
use tagweave_collection::sidecar::{
    ACCEPTED_PROPERTY, TAGWEAVE_XMP_NAMESPACE, TAGWEAVE_XMP_PREFIX,
};

use crate::plan::NewTag;

const DC: &[u8] = b"http://purl.org/dc/elements/1.1/";
const RDF: &[u8] = b"http://www.w3.org/1999/02/22-rdf-syntax-ns#";
const XML: &[u8] = b"http://www.w3.org/XML/1998/namespace";

/// Why `tag` cannot be an XMP keyword, if it cannot.
pub(crate) fn xmp_problem(tag: &str) -> Option<&'static str> {
    // source: XML 1.0 (Fifth Edition) production [2] Char — U+FFFE and U+FFFF are not
    // characters XML may contain, even as references (control characters are refused earlier).
    tag.contains(['\u{fffe}', '\u{ffff}'])
        .then_some("it contains U+FFFE or U+FFFF, which XML cannot hold; retype the tag")
}

/// The packet with `add` appended to its first keyword array (or a new `dc:subject` in its
/// first `rdf:Description`), the accepted suggestions among them also to tagweave's bag of
/// accepted suggestions (made the same way when missing), and every plain item that
/// normalises into `remove` taken out of both. The error text says why the packet cannot be
/// edited safely.
pub(crate) fn edit_xmp(
    before: &str,
    add: &[NewTag],
    remove: &HashSet<String>,
) -> Result<String, String> {
    let (bom, body) = match before.strip_prefix('\u{feff}') {
        Some(rest) => ("\u{feff}", rest),
        None => ("", before),
    };
    let packet = scan(body)?;
    if packet.read_only {
        return Err("the packet is marked read-only (<?xpacket end=\"r\"?>)".into());
    }
    let layout = Layout {
        body,
        newline: if body.contains("\r\n") { "\r\n" } else { "\n" },
        unit: indent_unit(body),
    };
    let mut edits: Vec<(Range<usize>, String)> = Vec::new();
    for array in packet.subjects.iter().filter_map(|s| s.array.as_ref()) {
        for item in &array.items {
            let doomed =
                item.plain && normalize_tag(&item.text).is_some_and(|t| remove.contains(&t));
            if doomed {
                edits.push((layout.whole_lines(item.span.clone()), String::new()));
            }
        }
    }
    let mut new_properties = Vec::new();
    let all: Vec<&str> = add.iter().map(|t| t.spelling.as_str()).collect();
    let suggested: Vec<&str> = add
        .iter()
        .filter(|t| t.suggested)
        .map(|t| t.spelling.as_str())
        .collect();
    for (which, spellings) in [(Which::Keywords, all), (Which::Accepted, suggested)] {
        if spellings.is_empty() {
            continue;
        }
        match addition(&packet, &layout, which, &spellings)? {
            Insert::At(range, text) => edits.push((range, text)),
            Insert::NewProperty(block) => new_properties.extend(block),
        }
    }
    if !new_properties.is_empty() {
        edits.push(into_first_description(&packet, &layout, &new_properties)?);
    }
    splice(body, bom, edits)
}

/// The plain keywords of the packet as written (trimmed, document order, repeats kept), for
/// writing a tag back the way the collection spells it. Qualified items are left out; a packet
/// this module could not read gives none.
pub(crate) fn xmp_spellings(text: &str) -> Vec<String> {
    let body = text.strip_prefix('\u{feff}').unwrap_or(text);
    let Ok(packet) = scan(body) else {
        return Vec::new();
    };
    packet
        .subjects
        .iter()
        .filter(|s| s.which == Which::Keywords)
        .filter_map(|s| s.array.as_ref())
        .flat_map(|array| &array.items)
        .filter(|item| item.plain)
        .map(|item| item.text.trim())
        .filter(|text| !text.is_empty())
        .map(str::to_string)
        .collect()
}

/// Which bag of the packet an edit is about.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Which {
    /// `dc:subject`: the keywords.
    Keywords,
    /// tagweave's bag of the keywords that were suggestions a person accepted.
    Accepted,
}

impl Which {
    /// The property's name as messages give it.
    fn name(self) -> String {
        match self {
            Which::Keywords => "dc:subject".to_string(),
            Which::Accepted => format!("{TAGWEAVE_XMP_PREFIX}:{ACCEPTED_PROPERTY}"),
        }
    }
}

/// Where new items go.
enum Insert {
    /// Into the property's existing array.
    At(Range<usize>, String),
    /// A whole new property element (lines with their depth), for the first `rdf:Description`.
    NewProperty(Vec<(usize, String)>),
}

/// Where the new items of one property go, and their text.
fn addition(
    packet: &Packet,
    layout: &Layout,
    which: Which,
    add: &[&str],
) -> Result<Insert, String> {
    let items = |li: &str| -> Vec<(usize, String)> {
        add.iter()
            .map(|tag| {
                let text = quick_xml::escape::partial_escape(tag.trim());
                (0, format!("<{li}>{text}</{li}>"))
            })
            .collect()
    };
    if let Some(subject) = packet.subjects.iter().find(|s| s.which == which) {
        if let Some(problem) = &subject.problem {
            return Err(problem.clone());
        }
        let Some(array) = &subject.array else {
            return Err(format!("{} holds no rdf:Bag", which.name()));
        };
        if array.kind == b"Alt" {
            return Err(format!(
                "{} is an rdf:Alt (a choice between alternatives), not an rdf:Bag",
                which.name()
            ));
        }
        let li = format!("{}li", prefix_of(&array.qname));
        let (range, text) = match &array.end {
            Some(end) => {
                let indent = array
                    .items
                    .iter()
                    .find_map(|item| layout.own_line_indent(item.span.start));
                layout.before_close(end.start, indent, &items(&li))
            }
            None => layout.expand_empty(&array.start, &array.qname, &items(&li)),
        };
        return Ok(Insert::At(range, text));
    }
    if which == Which::Keywords && packet.descriptions.iter().any(|d| d.subject_attribute) {
        return Err("dc:subject is written as an attribute of rdf:Description".into());
    }
    let Some(description) = packet.descriptions.first() else {
        return Err(format!(
            "there is no rdf:Description inside rdf:RDF to hold {}",
            which.name()
        ));
    };
    let rdf = prefix_of(&description.qname);
    let (prefix, local, namespace) = match which {
        Which::Keywords => (&description.dc_prefix, "subject", DC),
        Which::Accepted => (
            &description.own_prefix,
            ACCEPTED_PROPERTY,
            TAGWEAVE_XMP_NAMESPACE.as_bytes(),
        ),
    };
    let (open, close) = match prefix {
        Some(p) => (format!("<{p}:{local}>"), format!("</{p}:{local}>")),
        None => {
            let p = match which {
                Which::Keywords => "dc",
                Which::Accepted => TAGWEAVE_XMP_PREFIX,
            };
            (
                format!(
                    "<{p}:{local} xmlns:{p}=\"{}\">",
                    std::str::from_utf8(namespace).unwrap_or_default()
                ),
                format!("</{p}:{local}>"),
            )
        }
    };
    let mut block = vec![(0, open), (1, format!("<{rdf}Bag>"))];
    block.extend(
        items(&format!("{rdf}li"))
            .into_iter()
            .map(|(depth, text)| (depth + 2, text)),
    );
    block.push((1, format!("</{rdf}Bag>")));
    block.push((0, close));
    Ok(Insert::NewProperty(block))
}

/// New property elements placed at the end of the first `rdf:Description`.
fn into_first_description(
    packet: &Packet,
    layout: &Layout,
    block: &[(usize, String)],
) -> Result<(Range<usize>, String), String> {
    let description = packet
        .descriptions
        .first()
        .ok_or("there is no rdf:Description inside rdf:RDF")?;
    Ok(match &description.end {
        Some(end) => layout.before_close(end.start, None, block),
        None => layout.expand_empty(&description.start, &description.qname, block),
    })
}

/// Applies non-overlapping replacements to `body`.
fn splice(body: &str, bom: &str, mut edits: Vec<(Range<usize>, String)>) -> Result<String, String> {
    edits.sort_by_key(|(range, _)| (range.start, range.end));
    let mut out = String::with_capacity(body.len() + 256);
    out.push_str(bom);
    let mut cursor = 0;
    for (range, text) in edits {
        if range.start < cursor || range.end > body.len() {
            return Err("two edits would overlap".into());
        }
        out.push_str(&body[cursor..range.start]);
        out.push_str(&text);
        cursor = range.end;
    }
    out.push_str(&body[cursor..]);
    Ok(out)
}

/// `rdf:` from `rdf:Bag`; empty for a name in the default namespace.
fn prefix_of(qname: &str) -> &str {
    qname.rfind(':').map_or("", |i| &qname[..=i])
}

/// The smallest indentation any line has: one level of this file's indenting.
fn indent_unit(body: &str) -> String {
    body.lines()
        .filter(|line| !line.trim().is_empty())
        .map(|line| &line[..line.len() - line.trim_start_matches([' ', '\t']).len()])
        .filter(|ws| !ws.is_empty())
        .min_by_key(|ws| ws.len())
        .unwrap_or("  ")
        .to_string()
}

/// How the file lays out its lines, to make new lines look like their neighbours.
struct Layout<'a> {
    body: &'a str,
    newline: &'static str,
    unit: String,
}

impl Layout<'_> {
    fn line_start(&self, at: usize) -> usize {
        self.body[..at].rfind('\n').map_or(0, |i| i + 1)
    }

    /// The indentation before `at` when only whitespace precedes it on a line that is not
    /// the first.
    fn own_line_indent(&self, at: usize) -> Option<&str> {
        let start = self.line_start(at);
        let before = &self.body[start..at];
        (start > 0 && before.chars().all(|c| c == ' ' || c == '\t')).then_some(before)
    }

    /// The element's whole line(s) when nothing else shares them, else just the element.
    fn whole_lines(&self, span: Range<usize>) -> Range<usize> {
        let start = self.line_start(span.start);
        let lead_blank = self.body[start..span.start].trim().is_empty();
        match self.body[span.end..].find('\n') {
            Some(i) if lead_blank && self.body[span.end..span.end + i].trim().is_empty() => {
                start..span.end + i + 1
            }
            _ => span,
        }
    }

    fn lines(&self, indent: &str, block: &[(usize, String)]) -> String {
        block
            .iter()
            .map(|(depth, text)| {
                format!("{indent}{}{text}{}", self.unit.repeat(*depth), self.newline)
            })
            .collect()
    }

    /// New children just before an end tag: on lines of their own (indented like `indent`,
    /// or one level deeper than the end tag) when the end tag has its own line, else inline.
    fn before_close(
        &self,
        close: usize,
        indent: Option<&str>,
        block: &[(usize, String)],
    ) -> (Range<usize>, String) {
        match self.own_line_indent(close) {
            Some(close_indent) => {
                let indent =
                    indent.map_or_else(|| format!("{close_indent}{}", self.unit), str::to_string);
                let at = self.line_start(close);
                (at..at, self.lines(&indent, block))
            }
            None => (
                close..close,
                block.iter().map(|(_, text)| text.as_str()).collect(),
            ),
        }
    }

    /// `<name .../>` turned into `<name ...>children</name>`.
    fn expand_empty(
        &self,
        span: &Range<usize>,
        qname: &str,
        block: &[(usize, String)],
    ) -> (Range<usize>, String) {
        let tag = &self.body[span.clone()];
        let open = tag.strip_suffix("/>").unwrap_or(tag);
        let text = match self.own_line_indent(span.start) {
            Some(indent) => format!(
                "{open}>{}{}{indent}</{qname}>",
                self.newline,
                self.lines(&format!("{indent}{}", self.unit), block)
            ),
            None => {
                let inner: String = block.iter().map(|(_, text)| text.as_str()).collect();
                format!("{open}>{inner}</{qname}>")
            }
        };
        (span.clone(), text)
    }
}

/// What the scan found.
#[derive(Default)]
struct Packet {
    subjects: Vec<Subject>,
    descriptions: Vec<Description>,
    read_only: bool,
}

/// `dc:subject`, or tagweave's bag of accepted suggestions.
struct Subject {
    which: Which,
    array: Option<Array>,
    /// Why new keywords cannot go here.
    problem: Option<String>,
}

struct Array {
    kind: &'static [u8],
    qname: String,
    /// The start tag (the whole element when self-closing).
    start: Range<usize>,
    /// The end tag; `None` when self-closing.
    end: Option<Range<usize>>,
    items: Vec<Item>,
}

struct Item {
    span: Range<usize>,
    text: String,
    /// Text only: no `rdf:value`, no child elements, no attributes but `xml:lang`.
    plain: bool,
}

struct Description {
    qname: String,
    start: Range<usize>,
    end: Option<Range<usize>>,
    /// A prefix bound to the Dublin Core namespace where the description is.
    dc_prefix: Option<String>,
    /// A prefix bound to tagweave's namespace where the description is.
    own_prefix: Option<String>,
    subject_attribute: bool,
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum Frame {
    Rdf,
    Description(usize),
    Subject(usize),
    Array(usize),
    Item(usize),
    /// Anything inside an item: the item is in qualified form.
    InItem,
    Other,
}

/// An attribute's namespace (if bound) and local name.
type AttributeName = (Option<Vec<u8>>, Vec<u8>);

struct Scanner<'a> {
    reader: NsReader<&'a [u8]>,
    stack: Vec<Frame>,
    packet: Packet,
    /// Start offset, text and plainness of the item being read.
    item: Option<(usize, String, bool)>,
}

/// Walks the packet once, recording byte offsets of the parts that matter.
fn scan(body: &str) -> Result<Packet, String> {
    let mut scanner = Scanner {
        reader: NsReader::from_str(body),
        stack: Vec::new(),
        packet: Packet::default(),
        item: None,
    };
    loop {
        let start = position(&scanner.reader);
        let event = scanner
            .reader
            .read_event()
            .map_err(|e| format!("not well-formed XML: {e}"))?;
        let span = start..position(&scanner.reader);
        match event {
            Event::Start(tag) => {
                let frame = scanner.open(&tag, span, false)?;
                scanner.stack.push(frame);
            }
            Event::Empty(tag) => {
                scanner.open(&tag, span, true)?;
            }
            Event::End(_) => scanner.close(span),
            Event::Text(text) => {
                let text = text.xml10_content().map_err(|e| format!("bad text: {e}"))?;
                scanner.text(&text);
            }
            Event::CData(text) => {
                let text = text
                    .xml10_content()
                    .map_err(|e| format!("bad CDATA: {e}"))?;
                scanner.text(&text);
            }
            Event::GeneralRef(reference) => {
                let text = match reference.resolve_char_ref() {
                    Ok(Some(ch)) => ch.to_string(),
                    _ => {
                        let name = reference.decode().map_err(|e| e.to_string())?;
                        quick_xml::escape::resolve_xml_entity(&name)
                            .ok_or_else(|| format!("undeclared entity &{name};"))?
                            .to_string()
                    }
                };
                scanner.text(&text);
            }
            Event::PI(pi) => {
                let content = String::from_utf8_lossy(&pi);
                if content.starts_with("xpacket")
                    && (content.contains("end=\"r\"") || content.contains("end='r'"))
                {
                    scanner.packet.read_only = true;
                }
            }
            Event::DocType(_) => return Err("the packet declares a DOCTYPE".into()),
            Event::Decl(_) | Event::Comment(_) => {}
            Event::Eof => break,
        }
    }
    Ok(scanner.packet)
}

fn position(reader: &NsReader<&[u8]>) -> usize {
    usize::try_from(reader.buffer_position()).unwrap_or(usize::MAX)
}

impl Scanner<'_> {
    fn open(&mut self, tag: &BytesStart, span: Range<usize>, empty: bool) -> Result<Frame, String> {
        let parent = self.stack.last().copied();
        let qname = String::from_utf8_lossy(tag.name().as_ref()).into_owned();
        let (ns, local) = self.reader.resolve_element(tag.name());
        let ns = match ns {
            ResolveResult::Bound(ns) => Some(ns.into_inner()),
            _ => None,
        };
        let attributes = self.attributes(tag)?;
        let frame = match (parent, ns, local.as_ref()) {
            (Some(Frame::Item(_) | Frame::InItem), _, _) => {
                if let Some(item) = &mut self.item {
                    item.2 = false;
                }
                Frame::InItem
            }
            (_, Some(RDF), b"RDF") => Frame::Rdf,
            (Some(Frame::Rdf), Some(RDF), b"Description") => {
                let prefix_for = |namespace: &[u8]| {
                    self.reader
                        .resolver()
                        .bindings()
                        .find_map(|(prefix, ns)| match prefix {
                            PrefixDeclaration::Named(p) if ns.into_inner() == namespace => {
                                Some(String::from_utf8_lossy(p).into_owned())
                            }
                            _ => None,
                        })
                };
                let dc_prefix = prefix_for(DC);
                let own_prefix = prefix_for(TAGWEAVE_XMP_NAMESPACE.as_bytes());
                self.packet.descriptions.push(Description {
                    qname,
                    start: span.clone(),
                    end: None,
                    dc_prefix,
                    own_prefix,
                    subject_attribute: attributes
                        .iter()
                        .any(|(ns, local)| ns.as_deref() == Some(DC) && local == b"subject"),
                });
                Frame::Description(self.packet.descriptions.len() - 1)
            }
            (_, Some(namespace), local)
                if (namespace == DC && local == b"subject")
                    || (namespace == TAGWEAVE_XMP_NAMESPACE.as_bytes()
                        && local == ACCEPTED_PROPERTY.as_bytes()) =>
            {
                let which = if namespace == DC {
                    Which::Keywords
                } else {
                    Which::Accepted
                };
                let problem = if empty {
                    Some(format!(
                        "{} is a self-closing element, not an rdf:Bag",
                        which.name()
                    ))
                } else if !attributes.is_empty() {
                    Some(format!(
                        "{} carries attributes (such as rdf:parseType)",
                        which.name()
                    ))
                } else {
                    None
                };
                self.packet.subjects.push(Subject {
                    which,
                    array: None,
                    problem,
                });
                Frame::Subject(self.packet.subjects.len() - 1)
            }
            (Some(Frame::Subject(s)), Some(RDF), kind @ (b"Bag" | b"Seq" | b"Alt")) => {
                let subject = &mut self.packet.subjects[s];
                if subject.array.is_some() {
                    let name = subject.which.name();
                    subject
                        .problem
                        .get_or_insert_with(|| format!("{name} holds more than one array"));
                }
                subject.array = Some(Array {
                    kind: match kind {
                        b"Bag" => b"Bag",
                        b"Seq" => b"Seq",
                        _ => b"Alt",
                    },
                    qname,
                    start: span.clone(),
                    end: None,
                    items: Vec::new(),
                });
                Frame::Array(s)
            }
            (Some(Frame::Subject(s)), _, _) => {
                let subject = &mut self.packet.subjects[s];
                let name = subject.which.name();
                subject.problem.get_or_insert_with(|| {
                    format!("{name} holds something other than one rdf:Bag")
                });
                Frame::Other
            }
            (Some(Frame::Array(s)), Some(RDF), b"li") => {
                let plain = attributes
                    .iter()
                    .all(|(ns, local)| ns.as_deref() == Some(XML) && local == b"lang");
                self.item = Some((span.start, String::new(), plain));
                Frame::Item(s)
            }
            _ => Frame::Other,
        };
        if empty {
            self.close_frame(frame, span);
        }
        Ok(frame)
    }

    /// Attribute names other than namespace declarations, resolved to (namespace, local).
    fn attributes(&self, tag: &BytesStart) -> Result<Vec<AttributeName>, String> {
        let mut names = Vec::new();
        for attribute in tag.attributes() {
            let attribute = attribute.map_err(|e| format!("bad attribute: {e}"))?;
            let key = attribute.key;
            if key.as_namespace_binding().is_some() {
                continue;
            }
            let (ns, local) = self.reader.resolve_attribute(key);
            let ns = match ns {
                ResolveResult::Bound(ns) => Some(ns.into_inner().to_vec()),
                _ => None,
            };
            names.push((ns, local.as_ref().to_vec()));
        }
        Ok(names)
    }

    fn close(&mut self, span: Range<usize>) {
        if let Some(frame) = self.stack.pop() {
            self.close_frame(frame, span);
        }
    }

    /// Records where an element ends (`span` is its end tag, or the whole self-closing tag).
    fn close_frame(&mut self, frame: Frame, span: Range<usize>) {
        match frame {
            Frame::Item(s) => {
                if let Some((start, text, plain)) = self.item.take() {
                    if let Some(array) = &mut self.packet.subjects[s].array {
                        array.items.push(Item {
                            span: start..span.end,
                            text,
                            plain,
                        });
                    }
                }
            }
            Frame::Array(s) => {
                if let Some(array) = &mut self.packet.subjects[s].array {
                    if array.start != span {
                        array.end = Some(span);
                    }
                }
            }
            Frame::Description(d) => {
                let description = &mut self.packet.descriptions[d];
                if description.start != span {
                    description.end = Some(span);
                }
            }
            _ => {}
        }
    }

    fn text(&mut self, text: &str) {
        match self.stack.last() {
            Some(Frame::Item(_)) => {
                if let Some(item) = &mut self.item {
                    item.1.push_str(text);
                }
            }
            Some(Frame::Subject(s)) if !text.trim().is_empty() => {
                self.packet.subjects[*s]
                    .problem
                    .get_or_insert_with(|| "dc:subject holds text instead of an rdf:Bag".into());
            }
            _ => {}
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tagweave_collection::sidecar::parse_xmp;

    const RDF_URI: &str = "http://www.w3.org/1999/02/22-rdf-syntax-ns#";
    const DC_URI: &str = "http://purl.org/dc/elements/1.1/";

    /// Laid out after the serialisation example of the XMP specification (Adobe XMP
    /// Specification Part 1 / ISO 16684-1, "XMP serialization": packet wrapper,
    /// x:xmpmeta > rdf:RDF > rdf:Description, dc:subject as an rdf:Bag of rdf:li).
    const SPEC_PACKET: &str = "<?xpacket begin=\"\u{feff}\" id=\"W5M0MpCehiHzreSzNTczkc9d\"?>
<x:xmpmeta xmlns:x=\"adobe:ns:meta/\">
  <rdf:RDF xmlns:rdf=\"http://www.w3.org/1999/02/22-rdf-syntax-ns#\">
    <rdf:Description rdf:about=\"\" xmlns:dc=\"http://purl.org/dc/elements/1.1/\">
      <dc:subject>
        <rdf:Bag>
          <rdf:li>Harbour</rdf:li>
          <rdf:li>fishing  boats</rdf:li>
        </rdf:Bag>
      </dc:subject>
    </rdf:Description>
  </rdf:RDF>
</x:xmpmeta>
<?xpacket end=\"w\"?>";

    fn strings(tags: &[&str]) -> Vec<NewTag> {
        NewTag::all(tags, false)
    }

    fn accepted(tags: &[&str]) -> Vec<NewTag> {
        NewTag::all(tags, true)
    }

    #[test]
    fn accepted_suggestions_go_into_our_own_bag_too() {
        let mut add = strings(&["pier"]);
        add.extend(accepted(&["Sea"]));
        let after = edit_xmp(SPEC_PACKET, &add, &HashSet::new()).unwrap();
        // by hand: both keywords appended to dc:subject; tagweave's bag made, with its
        // namespace declared, at the end of the description.
        assert!(after.contains(
            "          <rdf:li>fishing  boats</rdf:li>\n          <rdf:li>pier</rdf:li>\n          <rdf:li>Sea</rdf:li>\n        </rdf:Bag>"
        ), "{after}");
        assert!(after.contains(
            "      <tagweave:acceptedSuggestions xmlns:tagweave=\"https://tagweave.invalid/xmp/1.0/\">\n        <rdf:Bag>\n          <rdf:li>Sea</rdf:li>\n        </rdf:Bag>\n      </tagweave:acceptedSuggestions>\n    </rdf:Description>"
        ), "{after}");
        let read = tagweave_collection::sidecar::parse_xmp_marked(after.as_bytes()).unwrap();
        assert_eq!(read.tags, ["harbour", "fishing-boats", "pier", "sea"]);
        assert_eq!(read.accepted, ["sea"]);
        // A second accepted suggestion joins the bag; removing one takes it out of both.
        let again = edit_xmp(&after, &accepted(&["gull"]), &set(&["sea"])).unwrap();
        let read = tagweave_collection::sidecar::parse_xmp_marked(again.as_bytes()).unwrap();
        assert_eq!(read.tags, ["harbour", "fishing-boats", "pier", "gull"]);
        assert_eq!(read.accepted, ["gull"]);
        assert_eq!(again.matches("acceptedSuggestions xmlns").count(), 1);
        // A packet with neither property gets both, in one description.
        let bare =
            format!("<rdf:RDF xmlns:rdf=\"{RDF_URI}\"><rdf:Description rdf:about=\"\"/></rdf:RDF>");
        let both = edit_xmp(&bare, &accepted(&["kelp"]), &HashSet::new()).unwrap();
        let read = tagweave_collection::sidecar::parse_xmp_marked(both.as_bytes()).unwrap();
        assert_eq!(
            (read.tags, read.accepted),
            (strs(&["kelp"]), strs(&["kelp"]))
        );
        assert!(parse_xmp(both.as_bytes()).is_ok());
    }

    fn strs(tags: &[&str]) -> Vec<String> {
        tags.iter().map(|t| t.to_string()).collect()
    }

    fn set(tags: &[&str]) -> HashSet<String> {
        tags.iter().map(|t| t.to_string()).collect()
    }

    fn add(packet: &str, tags: &[&str]) -> String {
        edit_xmp(packet, &strings(tags), &HashSet::new()).unwrap()
    }

    fn refusal(packet: &str) -> String {
        edit_xmp(packet, &strings(&["kelp"]), &HashSet::new()).unwrap_err()
    }

    #[test]
    fn appends_items_to_the_existing_bag() {
        // source: XMP spec part 1 — dc:subject is an unordered array, serialised as rdf:Bag
        // whose items are rdf:li; by hand: new items indented like the old ones, text escaped.
        let after = add(SPEC_PACKET, &["Rock & Roll", "<storm>"]);
        let expected = SPEC_PACKET.replace(
            "        </rdf:Bag>",
            "          <rdf:li>Rock &amp; Roll</rdf:li>\n          <rdf:li>&lt;storm&gt;</rdf:li>\n        </rdf:Bag>",
        );
        assert_eq!(after, expected);
        assert_eq!(
            parse_xmp(after.as_bytes()).unwrap(),
            ["harbour", "fishing-boats", "rock-&-roll", "<storm>"]
        );
    }

    #[test]
    fn spellings_are_the_plain_items_as_written() {
        let packet = SPEC_PACKET.replace(
            "<rdf:li>Harbour</rdf:li>",
            "<rdf:li> Harbour </rdf:li><rdf:li rdf:value=\"kelp\"/><rdf:li>Rock &amp; Roll</rdf:li>",
        );
        assert_eq!(
            xmp_spellings(&packet),
            ["Harbour", "Rock & Roll", "fishing  boats"]
        );
        assert!(xmp_spellings("<not xml").is_empty());
    }

    #[test]
    fn removes_whole_item_lines_only() {
        let after = edit_xmp(SPEC_PACKET, &[], &set(&["harbour"])).unwrap();
        assert_eq!(
            after,
            SPEC_PACKET.replace("          <rdf:li>Harbour</rdf:li>\n", "")
        );
        // Removing the last item and adding in one go: the new item takes its place.
        let after = edit_xmp(SPEC_PACKET, &strings(&["kelp"]), &set(&["fishing-boats"])).unwrap();
        assert_eq!(
            after,
            SPEC_PACKET.replace("<rdf:li>fishing  boats</rdf:li>", "<rdf:li>kelp</rdf:li>")
        );
    }

    #[test]
    fn single_line_packet_is_edited_inline() {
        let packet = format!(
            "<rdf:RDF xmlns:rdf=\"{RDF_URI}\" xmlns:dc=\"{DC_URI}\"><rdf:Description><dc:subject><rdf:Bag><rdf:li>a</rdf:li><rdf:li>b</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"
        );
        let after = edit_xmp(&packet, &strings(&["c"]), &set(&["a"])).unwrap();
        assert_eq!(
            after,
            packet
                .replace("<rdf:li>a</rdf:li>", "")
                .replace("</rdf:Bag>", "<rdf:li>c</rdf:li></rdf:Bag>")
        );
    }

    #[test]
    fn adds_dc_subject_where_there_is_none() {
        let packet = format!(
            "<x:xmpmeta xmlns:x=\"adobe:ns:meta/\">\r
 <rdf:RDF xmlns:rdf=\"{RDF_URI}\">\r
  <rdf:Description rdf:about=\"\" xmlns:d=\"{DC_URI}\" xmlns:xmp=\"http://ns.adobe.com/xap/1.0/\">\r
   <xmp:Rating>3</xmp:Rating>\r
   <d:title><rdf:Alt><rdf:li xml:lang=\"x-default\">Dawn</rdf:li></rdf:Alt></d:title>\r
  </rdf:Description>\r
 </rdf:RDF>\r
</x:xmpmeta>\r
"
        );
        // by hand: one level deeper than </rdf:Description>, the file's one-space unit, its
        // CRLF line ends, and the prefix the packet already binds to Dublin Core.
        let after = add(&packet, &["kelp"]);
        let expected = packet.replace(
            "  </rdf:Description>",
            "   <d:subject>\r\n    <rdf:Bag>\r\n     <rdf:li>kelp</rdf:li>\r\n    </rdf:Bag>\r\n   </d:subject>\r\n  </rdf:Description>",
        );
        assert_eq!(after, expected);
        assert_eq!(parse_xmp(after.as_bytes()).unwrap(), ["kelp"]);
    }

    #[test]
    fn declares_dublin_core_and_opens_a_self_closing_description() {
        let packet = format!(
            "<rdf:RDF xmlns:rdf=\"{RDF_URI}\">
  <rdf:Description rdf:about=\"\" xmlns:xmp=\"http://ns.adobe.com/xap/1.0/\" xmp:Rating=\"3\"/>
</rdf:RDF>
"
        );
        let after = add(&packet, &["kelp"]);
        let expected = format!(
            "<rdf:RDF xmlns:rdf=\"{RDF_URI}\">
  <rdf:Description rdf:about=\"\" xmlns:xmp=\"http://ns.adobe.com/xap/1.0/\" xmp:Rating=\"3\">
    <dc:subject xmlns:dc=\"{DC_URI}\">
      <rdf:Bag>
        <rdf:li>kelp</rdf:li>
      </rdf:Bag>
    </dc:subject>
  </rdf:Description>
</rdf:RDF>
"
        );
        assert_eq!(after, expected);
        assert_eq!(parse_xmp(after.as_bytes()).unwrap(), ["kelp"]);
    }

    #[test]
    fn opens_a_self_closing_bag() {
        let packet = format!(
            "<rdf:RDF xmlns:rdf=\"{RDF_URI}\" xmlns:dc=\"{DC_URI}\">
 <rdf:Description>
  <dc:subject>
   <rdf:Bag/>
  </dc:subject>
 </rdf:Description>
</rdf:RDF>"
        );
        let after = add(&packet, &["kelp"]);
        assert_eq!(
            after,
            packet.replace(
                "   <rdf:Bag/>",
                "   <rdf:Bag>\n    <rdf:li>kelp</rdf:li>\n   </rdf:Bag>"
            )
        );
    }

    #[test]
    fn prefixes_follow_the_packet() {
        let packet = format!(
            "<r:RDF xmlns:r=\"{RDF_URI}\"><r:Description xmlns:k=\"{DC_URI}\"><k:subject><r:Seq><r:li>a</r:li></r:Seq></k:subject></r:Description></r:RDF>"
        );
        let after = add(&packet, &["b"]);
        assert_eq!(after, packet.replace("</r:Seq>", "<r:li>b</r:li></r:Seq>"));
    }

    #[test]
    fn refuses_forms_it_does_not_edit() {
        let wrap = |inner: &str| {
            format!("<rdf:RDF xmlns:rdf=\"{RDF_URI}\" xmlns:dc=\"{DC_URI}\">{inner}</rdf:RDF>")
        };
        let cases = [
            (wrap("<rdf:Description><dc:subject/></rdf:Description>"), "self-closing"),
            (wrap("<rdf:Description dc:subject=\"x\"/>"), "attribute of rdf:Description"),
            (
                wrap("<rdf:Description><dc:subject rdf:parseType=\"Resource\"><rdf:value>x</rdf:value></dc:subject></rdf:Description>"),
                "attributes",
            ),
            (wrap("<rdf:Description><dc:subject>kelp</dc:subject></rdf:Description>"), "text"),
            (
                wrap("<rdf:Description><dc:subject><rdf:Alt><rdf:li>x</rdf:li></rdf:Alt></dc:subject></rdf:Description>"),
                "rdf:Alt",
            ),
            ("<x:xmpmeta xmlns:x=\"adobe:ns:meta/\"/>".to_string(), "no rdf:Description"),
            (SPEC_PACKET.replace("end=\"w\"", "end=\"r\""), "read-only"),
        ];
        for (packet, reason) in cases {
            let problem = refusal(&packet);
            assert!(problem.contains(reason), "{reason}: {problem}");
        }
        // A read-only packet is not edited for removals either.
        let read_only = SPEC_PACKET.replace("end=\"w\"", "end=\"r\"");
        assert!(edit_xmp(&read_only, &[], &set(&["harbour"])).is_err());
    }

    #[test]
    fn qualified_items_are_left_alone() {
        let packet = format!(
            "<rdf:RDF xmlns:rdf=\"{RDF_URI}\" xmlns:dc=\"{DC_URI}\"><rdf:Description><dc:subject><rdf:Bag>\n<rdf:li rdf:value=\"kelp\"/>\n<rdf:li>kelp</rdf:li>\n</rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"
        );
        let after = edit_xmp(&packet, &[], &set(&["kelp"])).unwrap();
        assert_eq!(after, packet.replace("<rdf:li>kelp</rdf:li>\n", ""));
        // The reader still sees the qualified one; the planner's read-back check refuses.
        assert_eq!(parse_xmp(after.as_bytes()).unwrap(), ["kelp"]);
    }
}
