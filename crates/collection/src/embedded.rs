//! Keywords kept inside the picture file itself: the XMP packet (JPEG APP1, PNG iTXt, TIFF
//! tag 700, WebP `XMP ` chunk) and IPTC IIM keywords (record 2, dataset 25) in a JPEG's
//! APP13 segment or a TIFF's tag 33723.
//!
//! Only the metadata segments are read: a JPEG is walked segment by segment up to its first
//! scan (SOS), a PNG chunk by chunk up to its first IDAT, a TIFF's first directory, and a
//! WebP's chunk headers (the image chunks are skipped, never read); a camera RAW's first
//! directory as a TIFF's (its preview is vision's to find). Every length is checked
//! against the file and against [`MAX_EMBEDDED_BYTES`]. Nothing here ever writes.

use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::Path;

use crate::item::ImageFormat;
use crate::xmp::parse_xmp;

/// Most metadata bytes read from one picture (all segments together); a keyword packet is a
/// few kilobytes, so anything bigger is not read.
pub const MAX_EMBEDDED_BYTES: u64 = 4 * 1024 * 1024;
/// Most segments, chunks or directory entries looked at before giving up on a picture.
const MAX_PARTS: usize = 4096;

const JPEG_XMP_HEADER: &[u8] = b"http://ns.adobe.com/xap/1.0/\0";
const PHOTOSHOP_HEADER: &[u8] = b"Photoshop 3.0\0";
const PNG_XMP_KEYWORD: &[u8] = b"XML:com.adobe.xmp";
/// Image resource id of IPTC-NAA data inside a Photoshop resource block.
const IPTC_RESOURCE: u16 = 0x0404;
/// TIFF tags holding the XMP packet and the IPTC data sets.
const TIFF_XMP_TAG: u16 = 700;
const TIFF_IPTC_TAG: u16 = 33723;

/// Keywords found inside a picture, in the order they were found: XMP first, then IPTC.
#[derive(Debug, Default, Clone, PartialEq, Eq)]
pub struct Embedded {
    /// Raw keywords (the caller normalises and merges them).
    pub keywords: Vec<String>,
    /// Where they came from, for the scan's note ("XMP packet", "IPTC keywords").
    pub sources: Vec<&'static str>,
    /// What could not be read; the picture is still indexed, without those keywords.
    pub problems: Vec<String>,
}

/// Reads the keywords embedded in the picture at `path`. Never fails: every problem is
/// reported in [`Embedded::problems`].
pub fn read_embedded(path: &Path, format: ImageFormat) -> Embedded {
    let mut found = Embedded::default();
    let file = match File::open(path) {
        Ok(f) => f,
        Err(e) => {
            found.problems.push(format!("cannot be opened again ({e})"));
            return found;
        }
    };
    let len = file.metadata().map(|m| m.len()).unwrap_or(0);
    let mut reader = Bounded {
        inner: BufReader::new(file),
        len,
        budget: MAX_EMBEDDED_BYTES,
    };
    let segments = match format {
        ImageFormat::Jpeg => jpeg_segments(&mut reader),
        ImageFormat::Png => png_segments(&mut reader),
        // A camera RAW's IFD0 is a TIFF directory (ORF and RW2 differ only in the magic
        // number, which is not checked).
        ImageFormat::Tiff
        | ImageFormat::Dng
        | ImageFormat::Cr2
        | ImageFormat::Nef
        | ImageFormat::Arw
        | ImageFormat::Orf
        | ImageFormat::Rw2
        | ImageFormat::Pef => tiff_segments(&mut reader),
        ImageFormat::Webp => webp_segments(&mut reader),
        ImageFormat::Bmp | ImageFormat::Gif => Ok(Segments::default()),
    };
    let segments = segments.unwrap_or_else(|problem| {
        found.problems.push(problem);
        Segments::default()
    });
    if let Some(packet) = segments.xmp {
        match parse_xmp(&packet) {
            Ok(keywords) => {
                if !keywords.is_empty() {
                    found.sources.push("XMP packet");
                }
                found.keywords.extend(keywords);
            }
            Err(e) => found.problems.push(format!("its XMP packet {e}")),
        }
    }
    if let Some(iim) = segments.iptc {
        match iptc_keywords(&iim) {
            Ok(keywords) => {
                if !keywords.is_empty() {
                    found.sources.push("IPTC keywords");
                }
                found.keywords.extend(keywords);
            }
            Err(e) => found.problems.push(format!("its IPTC keywords: {e}")),
        }
    }
    found
}

/// The raw metadata found while walking a file.
#[derive(Default)]
struct Segments {
    xmp: Option<Vec<u8>>,
    /// IPTC IIM data sets (the content of the IPTC-NAA resource).
    iptc: Option<Vec<u8>>,
}

/// A reader that knows the file's length and refuses to read past a byte budget.
struct Bounded {
    inner: BufReader<File>,
    len: u64,
    budget: u64,
}

impl Bounded {
    fn pos(&mut self) -> Result<u64, String> {
        self.inner.stream_position().map_err(|e| e.to_string())
    }

    /// Reads exactly `n` bytes, counting them against the budget.
    fn take(&mut self, n: u64, what: &str) -> Result<Vec<u8>, String> {
        let at = self.pos()?;
        if at.saturating_add(n) > self.len {
            return Err(format!(
                "{what} at byte {at} claims {n} bytes, past the end of the file"
            ));
        }
        if n > self.budget {
            return Err(format!(
                "{what} at byte {at} is {n} bytes, over the {MAX_EMBEDDED_BYTES}-byte limit for metadata"
            ));
        }
        self.budget -= n;
        let mut bytes = vec![0; n as usize];
        self.inner
            .read_exact(&mut bytes)
            .map_err(|e| format!("{what} at byte {at}: {e}"))?;
        Ok(bytes)
    }

    /// Small fixed-size fields (headers, lengths).
    fn array<const N: usize>(&mut self, what: &str) -> Result<[u8; N], String> {
        let bytes = self.take(N as u64, what)?;
        let mut out = [0; N];
        out.copy_from_slice(&bytes);
        Ok(out)
    }

    /// Moves past `n` bytes without reading them. A part that is not metadata running past
    /// the end is the picture's own damage, for the decoder to report: reading just stops.
    fn skip(&mut self, n: u64, what: &str) -> Result<(), String> {
        let at = self.pos()?;
        let to = at.saturating_add(n).min(self.len);
        self.inner
            .seek_relative((to - at) as i64)
            .map_err(|e| format!("{what} at byte {at}: {e}"))
    }

    fn seek_to(&mut self, offset: u64, what: &str) -> Result<(), String> {
        if offset > self.len {
            return Err(format!(
                "{what} points to byte {offset}, past the end of the file"
            ));
        }
        self.inner
            .seek(SeekFrom::Start(offset))
            .map(|_| ())
            .map_err(|e| format!("{what}: {e}"))
    }
}

/// JPEG: markers from SOI to the first SOS. APP1 with the XMP header holds the packet;
/// APP13 with the Photoshop header holds image resources, among them the IPTC data.
fn jpeg_segments(r: &mut Bounded) -> Result<Segments, String> {
    let mut found = Segments::default();
    let mut photoshop = Vec::new();
    r.array::<2>("the start marker")?;
    for _ in 0..MAX_PARTS {
        if r.pos()? >= r.len {
            break;
        }
        let [ff, mut marker] = r.array::<2>("a segment marker")?;
        if ff != 0xFF {
            let at = r.pos()? - 2;
            return Err(format!("no segment marker at byte {at}"));
        }
        while marker == 0xFF {
            // Fill bytes before a marker are allowed.
            marker = r.array::<1>("a segment marker")?[0];
        }
        match marker {
            // SOS: image data follows; EOI: the end.
            0xDA | 0xD9 => break,
            // Markers without a length.
            0x01 | 0xD0..=0xD7 => continue,
            _ => {}
        }
        let length = u16::from_be_bytes(r.array::<2>("a segment length")?) as u64;
        if length < 2 {
            let at = r.pos()? - 2;
            return Err(format!("segment at byte {at} has length {length}"));
        }
        let body = length - 2;
        let starts_with = |header: &[u8], r: &mut Bounded| -> Result<bool, String> {
            // Peek at the header without spending the budget on the whole segment.
            if body < header.len() as u64 {
                return Ok(false);
            }
            let head = r.take(header.len() as u64, "a segment header")?;
            if head == header {
                return Ok(true);
            }
            r.skip(body - header.len() as u64, "a segment")?;
            Ok(false)
        };
        match marker {
            0xE1 if found.xmp.is_none() => {
                if starts_with(JPEG_XMP_HEADER, r)? {
                    let rest = body - JPEG_XMP_HEADER.len() as u64;
                    found.xmp = Some(r.take(rest, "the XMP segment")?);
                } else if body < JPEG_XMP_HEADER.len() as u64 {
                    r.skip(body, "a segment")?;
                }
            }
            0xED => {
                if starts_with(PHOTOSHOP_HEADER, r)? {
                    let rest = body - PHOTOSHOP_HEADER.len() as u64;
                    // A resource block too big for one segment continues in the next.
                    photoshop.extend(r.take(rest, "the Photoshop segment")?);
                } else if body < PHOTOSHOP_HEADER.len() as u64 {
                    r.skip(body, "a segment")?;
                }
            }
            _ => r.skip(body, "a segment")?,
        }
    }
    if !photoshop.is_empty() {
        found.iptc = photoshop_iptc(&photoshop).map_err(|e| format!("its APP13 segment: {e}"))?;
    }
    Ok(found)
}

/// The IPTC-NAA resource of a Photoshop image resource block: a run of
/// `8BIM`, id (2), Pascal name padded to even length, size (4), data padded to even length.
fn photoshop_iptc(mut block: &[u8]) -> Result<Option<Vec<u8>>, String> {
    fn cut<'a>(block: &mut &'a [u8], n: usize) -> Result<&'a [u8], String> {
        if block.len() < n {
            return Err("an image resource runs past the segment's end".into());
        }
        let (head, rest) = block.split_at(n);
        *block = rest;
        Ok(head)
    }
    while !block.is_empty() {
        if block.iter().all(|&b| b == 0) {
            break;
        }
        if cut(&mut block, 4)? != b"8BIM" {
            return Err("an image resource does not start with 8BIM".into());
        }
        let id = u16::from_be_bytes(cut(&mut block, 2)?.try_into().unwrap());
        let name_len = cut(&mut block, 1)?[0] as usize;
        // The length byte and the name together are padded to an even size.
        cut(&mut block, name_len + (name_len + 1) % 2)?;
        let size = u32::from_be_bytes(cut(&mut block, 4)?.try_into().unwrap()) as usize;
        let data = cut(&mut block, size)?;
        if size % 2 == 1 && !block.is_empty() {
            cut(&mut block, 1)?;
        }
        if id == IPTC_RESOURCE {
            return Ok(Some(data.to_vec()));
        }
    }
    Ok(None)
}

/// Keywords (record 2, dataset 25) of IPTC IIM data sets. Each data set is
/// 0x1C, record, dataset, then a 2-byte length — or, when its top bit is set, the number of
/// following bytes that hold the length (IPTC IIM 4.2, section 1.5 "extended data set").
/// Text is UTF-8 when record 1 dataset 90 says so (ESC % G), or when it decodes as UTF-8;
/// otherwise it is read as Latin-1.
fn iptc_keywords(mut iim: &[u8]) -> Result<Vec<String>, String> {
    let mut raw = Vec::new();
    let mut utf8_declared = false;
    while let Some((&tag, rest)) = iim.split_first() {
        if tag != 0x1C {
            // Padding after the last data set is common; anything else ends the reading.
            if iim.iter().all(|&b| b == 0) {
                break;
            }
            return Err(format!("a data set does not start with 0x1C ({tag:#04x})"));
        }
        if rest.len() < 4 {
            return Err("a data set header is cut short".into());
        }
        let (record, dataset) = (rest[0], rest[1]);
        let short = u16::from_be_bytes([rest[2], rest[3]]);
        let mut rest = &rest[4..];
        let size = if short & 0x8000 == 0 {
            short as usize
        } else {
            let count = (short & 0x7FFF) as usize;
            if count == 0 || count > 4 || rest.len() < count {
                return Err(format!("an extended data set length of {count} bytes"));
            }
            let size = rest[..count]
                .iter()
                .fold(0usize, |n, &b| (n << 8) | b as usize);
            rest = &rest[count..];
            size
        };
        if rest.len() < size {
            return Err(format!(
                "data set {record}:{dataset} claims {size} bytes, past the end"
            ));
        }
        let (value, after) = rest.split_at(size);
        match (record, dataset) {
            (1, 90) => utf8_declared = value == b"\x1B%G",
            (2, 25) => raw.push(value.to_vec()),
            _ => {}
        }
        iim = after;
    }
    Ok(raw
        .into_iter()
        .map(|bytes| match String::from_utf8(bytes) {
            Ok(text) => text,
            Err(e) if utf8_declared => String::from_utf8_lossy(e.as_bytes()).into_owned(),
            Err(e) => e.into_bytes().iter().map(|&b| b as char).collect(),
        })
        .collect())
}

/// PNG: chunks from the signature to the first IDAT; the XMP packet is the text of an iTXt
/// chunk whose keyword is `XML:com.adobe.xmp`.
fn png_segments(r: &mut Bounded) -> Result<Segments, String> {
    let mut found = Segments::default();
    r.array::<8>("the signature")?;
    for _ in 0..MAX_PARTS {
        if r.pos()? >= r.len {
            break;
        }
        let length = u32::from_be_bytes(r.array::<4>("a chunk length")?) as u64;
        let kind = r.array::<4>("a chunk type")?;
        match &kind {
            b"IDAT" | b"IEND" => break,
            b"iTXt" if found.xmp.is_none() && length > PNG_XMP_KEYWORD.len() as u64 => {
                let head = r.take(PNG_XMP_KEYWORD.len() as u64 + 1, "an iTXt chunk")?;
                let rest = length - head.len() as u64;
                if head[..PNG_XMP_KEYWORD.len()] == *PNG_XMP_KEYWORD && head.ends_with(&[0]) {
                    let body = r.take(rest, "the XMP chunk")?;
                    found.xmp = Some(png_itxt_text(&body)?);
                } else {
                    r.skip(rest, "an iTXt chunk")?;
                }
            }
            _ => r.skip(length, "a chunk")?,
        }
        r.skip(4, "a chunk checksum")?;
    }
    Ok(found)
}

/// The text of an iTXt chunk after its keyword: compression flag, method, language tag,
/// translated keyword, text.
fn png_itxt_text(body: &[u8]) -> Result<Vec<u8>, String> {
    let [flag, _method, rest @ ..] = body else {
        return Err("its XMP chunk is cut short".into());
    };
    if *flag != 0 {
        return Err("its XMP chunk is compressed, which is not read yet".into());
    }
    let mut parts = rest.splitn(3, |&b| b == 0);
    let (_language, _translated, text) = (parts.next(), parts.next(), parts.next());
    text.map(<[u8]>::to_vec)
        .ok_or_else(|| "its XMP chunk is cut short".into())
}

/// TIFF: the XMP packet is tag 700 of the first image directory, IPTC data sets tag 33723.
fn tiff_segments(r: &mut Bounded) -> Result<Segments, String> {
    let header = r.array::<8>("the header")?;
    let big = match &header[..2] {
        b"II" => false,
        b"MM" => true,
        _ => return Err("the header names no byte order".into()),
    };
    let u16_at = |b: &[u8]| {
        let b = [b[0], b[1]];
        if big {
            u16::from_be_bytes(b)
        } else {
            u16::from_le_bytes(b)
        }
    };
    let u32_at = |b: &[u8]| {
        let b = [b[0], b[1], b[2], b[3]];
        if big {
            u32::from_be_bytes(b)
        } else {
            u32::from_le_bytes(b)
        }
    };
    r.seek_to(u32_at(&header[4..]) as u64, "the first directory")?;
    let count = u16_at(&r.array::<2>("the directory size")?) as usize;
    if count > MAX_PARTS {
        return Err(format!("its first directory claims {count} entries"));
    }
    let entries = r.take(count as u64 * 12, "the first directory")?;
    let mut found = Segments::default();
    for entry in entries.chunks_exact(12) {
        let (tag, kind, n) = (u16_at(entry), u16_at(&entry[2..]), u32_at(&entry[4..]));
        // BYTE (1) and UNDEFINED (7) take one byte per value, LONG (4) four.
        let size = match kind {
            1 | 7 => n as u64,
            4 => n as u64 * 4,
            _ => continue,
        };
        let what = match tag {
            TIFF_XMP_TAG => "the XMP packet",
            TIFF_IPTC_TAG => "the IPTC data",
            _ => continue,
        };
        let bytes = if size <= 4 {
            entry[8..8 + size as usize].to_vec()
        } else {
            r.seek_to(u32_at(&entry[8..]) as u64, what)?;
            r.take(size, what)?
        };
        match tag {
            TIFF_XMP_TAG => found.xmp = Some(bytes),
            _ => found.iptc = Some(bytes),
        }
    }
    Ok(found)
}

/// WebP: RIFF chunks (fourcc, little-endian size, data padded to even); the XMP packet is
/// the `XMP ` chunk, which follows the image data, so image chunks are skipped unread.
fn webp_segments(r: &mut Bounded) -> Result<Segments, String> {
    r.array::<12>("the RIFF header")?;
    for _ in 0..MAX_PARTS {
        if r.pos()? >= r.len {
            break;
        }
        let kind = r.array::<4>("a chunk type")?;
        let size = u32::from_le_bytes(r.array::<4>("a chunk size")?) as u64;
        if &kind == b"XMP " {
            return Ok(Segments {
                xmp: Some(r.take(size, "the XMP chunk")?),
                iptc: None,
            });
        }
        let padded = size + size % 2;
        if r.pos()?.saturating_add(padded) > r.len && r.pos()?.saturating_add(size) == r.len {
            break; // a last chunk without its pad byte
        }
        r.skip(padded, "a chunk")?;
    }
    Ok(Segments::default())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::test_support::put;

    fn fixture(name: &str) -> std::path::PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("testdata/embedded")
            .join(name)
    }

    fn read(name: &str, format: ImageFormat) -> Embedded {
        read_embedded(&fixture(name), format)
    }

    // source: written by Exempi 2.6.3 (through python-xmp-toolkit 2.1.0, XMPFiles
    // open_forupdate + put_xmp) into 8×8 pictures saved by Pillow 13.0.0; see
    // testdata/embedded/README.md.
    #[test]
    fn xmp_written_by_exempi_is_read_from_jpeg_png_and_tiff() {
        // Exempi also copies the keywords into IPTC data sets in JPEG and TIFF (its legacy
        // reconciliation), so those two carry each keyword twice before merging.
        for (name, format, sources) in [
            (
                "xmp-exempi.jpg",
                ImageFormat::Jpeg,
                &["XMP packet", "IPTC keywords"][..],
            ),
            ("xmp-exempi.png", ImageFormat::Png, &["XMP packet"][..]),
            (
                "xmp-exempi.tif",
                ImageFormat::Tiff,
                &["XMP packet", "IPTC keywords"][..],
            ),
        ] {
            let found = read(name, format);
            assert_eq!(
                &found.keywords[..3],
                ["harbour", "night-boats", "naïve-art"],
                "{name}"
            );
            if sources.len() == 2 {
                assert_eq!(
                    &found.keywords[3..],
                    ["Harbour", "  night boats ", "naïve art"]
                );
            }
            assert_eq!(found.sources, sources, "{name}");
            assert!(found.problems.is_empty(), "{name}: {:?}", found.problems);
        }
    }

    // source: written by ExifTool 12.57 (Debian libimage-exiftool-perl) into a lossy 8×8
    // WebP saved by Pillow; see testdata/embedded/README.md.
    #[test]
    fn xmp_written_by_exiftool_is_read_from_webp() {
        let found = read("xmp-exiftool.webp", ImageFormat::Webp);
        assert_eq!(found.keywords, ["harbour", "night-boats"]);
        assert!(found.problems.is_empty(), "{:?}", found.problems);
    }

    // source: IPTC keywords written by ExifTool 12.57 with `-charset iptc=UTF8`, which also
    // writes record 1 dataset 90 (ESC % G); see testdata/embedded/README.md.
    #[test]
    fn iptc_keywords_written_by_exiftool_are_read_from_app13() {
        let found = read("iptc-exiftool.jpg", ImageFormat::Jpeg);
        assert_eq!(found.keywords, ["Lighthouse", "café terrace", "fog"]);
        assert_eq!(found.sources, ["IPTC keywords"]);
        assert!(found.problems.is_empty(), "{:?}", found.problems);
    }

    // source: the Exempi JPEG above, then IPTC keywords added by ExifTool 12.57.
    #[test]
    fn xmp_comes_before_iptc_in_one_jpeg() {
        let found = read("xmp-exempi-iptc-exiftool.jpg", ImageFormat::Jpeg);
        assert_eq!(
            found.keywords,
            ["harbour", "night-boats", "naïve-art", "harbour", "gulls"]
        );
        assert_eq!(found.sources, ["XMP packet", "IPTC keywords"]);
    }

    /// A JPEG built by hand: SOI, the given segments, SOS, then `tail`.
    fn jpeg(segments: &[(u8, Vec<u8>)], tail: &[u8]) -> Vec<u8> {
        let mut out = vec![0xFF, 0xD8];
        for (marker, body) in segments {
            out.extend([0xFF, *marker]);
            out.extend(((body.len() + 2) as u16).to_be_bytes());
            out.extend(body);
        }
        out.extend([0xFF, 0xDA, 0x00, 0x02]);
        out.extend(tail);
        out
    }

    fn xmp_app1(packet: &str) -> (u8, Vec<u8>) {
        (0xE1, [JPEG_XMP_HEADER, packet.as_bytes()].concat())
    }

    const PACKET: &str = r#"<rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"
        xmlns:dc="http://purl.org/dc/elements/1.1/"><rdf:Description><dc:subject><rdf:Bag>
        <rdf:li>quay</rdf:li></rdf:Bag></dc:subject></rdf:Description></rdf:RDF>"#;

    fn read_bytes(bytes: &[u8], format: ImageFormat) -> Embedded {
        let dir = tempfile::tempdir().unwrap();
        read_embedded(&put(dir.path(), "pic", bytes), format)
    }

    #[test]
    fn nothing_after_the_first_scan_is_read() {
        // A packet after SOS is image data as far as the reader is concerned.
        let mut after = vec![0xFF, 0xE1];
        let (_, body) = xmp_app1(PACKET);
        after.extend(((body.len() + 2) as u16).to_be_bytes());
        after.extend(body);
        let found = read_bytes(&jpeg(&[], &after), ImageFormat::Jpeg);
        assert_eq!(found, Embedded::default());
        let found = read_bytes(&jpeg(&[xmp_app1(PACKET)], b""), ImageFormat::Jpeg);
        assert_eq!(found.keywords, ["quay"]);
    }

    #[test]
    fn other_app1_segments_are_passed_over() {
        let exif = (0xE1, b"Exif\0\0MM\0*rest".to_vec());
        let tiny = (0xE1, b"x".to_vec());
        let found = read_bytes(
            &jpeg(&[exif, tiny, (0xE0, vec![0; 14]), xmp_app1(PACKET)], b""),
            ImageFormat::Jpeg,
        );
        assert_eq!(found.keywords, ["quay"]);
        assert!(found.problems.is_empty(), "{:?}", found.problems);
    }

    #[test]
    fn damaged_metadata_is_a_problem_not_a_failure() {
        let cases: Vec<(Vec<u8>, &str)> = vec![
            // Segment length past the end of the file.
            (
                {
                    let mut b = jpeg(&[xmp_app1(PACKET)], b"");
                    b.truncate(40);
                    b
                },
                "past the end",
            ),
            // Not well-formed XML in the packet.
            (
                jpeg(&[xmp_app1("<rdf:RDF><unclosed></rdf:RDF>")], b""),
                "not well-formed",
            ),
            // A Photoshop block whose resource does not start with 8BIM.
            (
                jpeg(&[(0xED, [PHOTOSHOP_HEADER, b"8BIX\x04\x04"].concat())], b""),
                "8BIM",
            ),
            // Garbage where a marker should be.
            (b"\xFF\xD8\x00\x00".to_vec(), "no segment marker"),
        ];
        for (bytes, expected) in cases {
            let found = read_bytes(&bytes, ImageFormat::Jpeg);
            assert!(found.keywords.is_empty());
            assert_eq!(found.problems.len(), 1, "{:?}", found.problems);
            assert!(found.problems[0].contains(expected), "{:?}", found.problems);
        }
    }

    /// IPTC data sets as IPTC IIM 4.2 lays them out: 0x1C, record, dataset, length, value.
    fn iim(sets: &[(u8, u8, &[u8])]) -> Vec<u8> {
        let mut out = Vec::new();
        for (record, dataset, value) in sets {
            out.extend([0x1C, *record, *dataset]);
            out.extend((value.len() as u16).to_be_bytes());
            out.extend(*value);
        }
        out
    }

    #[test]
    fn iptc_text_encoding_and_extended_lengths() {
        // Latin-1 without a declared character set: é is the single byte 0xE9.
        let latin = iim(&[(2, 25, b"caf\xE9"), (2, 5, b"a title"), (2, 25, b"pier")]);
        assert_eq!(iptc_keywords(&latin).unwrap(), ["café", "pier"]);
        // Declared UTF-8 (ESC % G).
        let utf8 = iim(&[(1, 90, b"\x1B%G"), (2, 25, "café".as_bytes())]);
        assert_eq!(iptc_keywords(&utf8).unwrap(), ["café"]);
        // Extended data set: top bit set, the low bits count the length bytes that follow.
        let mut extended = vec![0x1C, 2, 25, 0x80, 0x02, 0x00, 0x04];
        extended.extend(b"mast");
        extended.extend([0, 0, 0]);
        assert_eq!(iptc_keywords(&extended).unwrap(), ["mast"]);
        // Cut short and wrong tag markers are errors.
        let mut cut = iim(&[(2, 25, b"rope")]);
        cut.truncate(7);
        assert!(iptc_keywords(&cut).unwrap_err().contains("past the end"));
        assert!(iptc_keywords(b"\x1D\x02").unwrap_err().contains("0x1d"));
    }

    #[test]
    fn photoshop_resources_with_names_and_odd_sizes() {
        let keywords = iim(&[(2, 25, b"net")]);
        let mut block = Vec::new();
        // A resource with a 3-letter name (4 bytes with its length: already even) and odd size.
        block.extend(b"8BIM\x03\xED\x03abc\x00\x00\x00\x03xyz\x00");
        block.extend(b"8BIM\x04\x04\x00\x00");
        block.extend((keywords.len() as u32).to_be_bytes());
        block.extend(&keywords);
        let segment = (0xED, [PHOTOSHOP_HEADER, &block].concat());
        let found = read_bytes(&jpeg(&[segment], b""), ImageFormat::Jpeg);
        assert_eq!(found.keywords, ["net"], "{:?}", found.problems);
    }

    #[test]
    fn png_stops_at_image_data_and_refuses_compressed_xmp() {
        fn chunk(kind: &[u8], data: &[u8]) -> Vec<u8> {
            let mut out = (data.len() as u32).to_be_bytes().to_vec();
            out.extend(kind);
            out.extend(data);
            out.extend([0; 4]); // the checksum is not checked
            out
        }
        let itxt =
            |flag: u8| [PNG_XMP_KEYWORD, &[0, flag, 0], b"en\0\0", PACKET.as_bytes()].concat();
        let sig = b"\x89PNG\r\n\x1a\n".to_vec();
        let before = [
            sig.clone(),
            chunk(b"IHDR", &[0; 13]),
            chunk(b"iTXt", &itxt(0)),
            chunk(b"IDAT", &[1, 2, 3]),
        ]
        .concat();
        assert_eq!(read_bytes(&before, ImageFormat::Png).keywords, ["quay"]);
        let after = [
            sig.clone(),
            chunk(b"IDAT", &[1, 2, 3]),
            chunk(b"iTXt", &itxt(0)),
        ]
        .concat();
        assert_eq!(read_bytes(&after, ImageFormat::Png), Embedded::default());
        let compressed = [sig, chunk(b"iTXt", &itxt(1))].concat();
        let found = read_bytes(&compressed, ImageFormat::Png);
        assert!(found.keywords.is_empty());
        assert!(
            found.problems[0].contains("compressed"),
            "{:?}",
            found.problems
        );
    }

    #[test]
    fn oversized_metadata_is_not_read() {
        // A TIFF whose XMP tag claims more than the limit: refused before any allocation.
        let mut tiff = b"II*\x00\x08\x00\x00\x00\x01\x00".to_vec();
        tiff.extend(TIFF_XMP_TAG.to_le_bytes());
        tiff.extend(7u16.to_le_bytes());
        tiff.extend(((MAX_EMBEDDED_BYTES + 1) as u32).to_le_bytes());
        tiff.extend(26u32.to_le_bytes());
        tiff.resize(26 + MAX_EMBEDDED_BYTES as usize + 1, b' ');
        let found = read_bytes(&tiff, ImageFormat::Tiff);
        assert!(found.keywords.is_empty());
        assert!(found.problems[0].contains("limit"), "{:?}", found.problems);
    }

    proptest::proptest! {
        #[test]
        fn never_panics_on_damaged_fixtures(
            which in 0usize..8,
            cut in 0usize..4000,
            at in 0usize..4000,
            byte in proptest::prelude::any::<u8>(),
        ) {
            let (name, format) = [
                ("xmp-exempi.jpg", ImageFormat::Jpeg),
                ("xmp-exempi.png", ImageFormat::Png),
                ("xmp-exempi.tif", ImageFormat::Tiff),
                ("xmp-exiftool.webp", ImageFormat::Webp),
                ("iptc-exiftool.jpg", ImageFormat::Jpeg),
                ("xmp-exempi-iptc-exiftool.jpg", ImageFormat::Jpeg),
                ("../raw/preview.dng", ImageFormat::Dng),
                ("../raw/preview.orf", ImageFormat::Orf),
            ][which];
            let mut bytes = std::fs::read(fixture(name)).unwrap();
            let at = at % bytes.len();
            bytes[at] = byte;
            bytes.truncate(cut.max(1));
            let _ = read_bytes(&bytes, format);
        }
    }
}
