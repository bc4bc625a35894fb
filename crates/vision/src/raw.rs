//! Camera RAW files read through the JPEG preview the camera stores inside them.
//!
//! DNG, CR2, NEF, ARW, ORF, RW2 and PEF are TIFF containers: directories of 12-byte entries
//! whose values point into the file. The preview is found by walking IFD0, the chain after
//! it (IFD1…), its SubIFDs (tag 0x014A) and the EXIF directory (0x8769), collecting
//! JPEGInterchangeFormat/Length (0x0201/0x0202), single strips (0x0111/0x0117) whose
//! Compression (0x0103) is 6 or 7, and an RW2's JpgFromRaw (0x002E); each must begin with a
//! JPEG SOI and be a DCT JPEG (the sensor data of many RAWs is a *lossless* JPEG, SOF3,
//! which is not a picture to look at). Sensor-data directories (PhotometricInterpretation
//! CFA or LinearRaw) are passed over. The largest preview that decodes wins.
//!
//! Written here rather than taken from a crate: the `tiff` crate (already built through
//! `image`) refuses ORF and RW2 headers, whose magic number is not 42, and prepares each
//! directory as an image to decode; the RAW decoders that list previews bring whole sensor
//! decoders with them. This walk only reads directory entries, over bytes in memory, with
//! every offset, count and directory chain checked (a loop is cut, an absurd count ignored).

use std::ops::Range;
use std::path::Path;

/// Extensions of the TIFF-based RAW formats (their header is an ordinary TIFF header, so
/// the name tells them from a TIFF picture): the same list as the collection crawl's. ORF
/// and RW2 are known by their own header.
const TIFF_RAW_EXTENSIONS: [&str; 6] = ["dng", "cr2", "nef", "nrw", "arw", "pef"];
/// Most directories visited in one file; real RAWs have fewer than a dozen.
const MAX_DIRECTORIES: usize = 64;
/// Most values read from one entry (strip lists of real previews have one).
const MAX_VALUES: u32 = 4096;

/// What the directories hold: preview byte ranges, largest first, and the orientation
/// IFD0 gives (previews seldom carry their own).
#[derive(Debug, Default, PartialEq)]
pub(crate) struct Previews {
    pub jpegs: Vec<Range<usize>>,
    pub orientation: Option<u8>,
    /// Why a preview (or directory) could not be used because the file ends too soon.
    pub cut_short: Option<String>,
}

/// True for a camera RAW: an ORF or RW2 header (ExifTool 12.57, Image/ExifTool.pm
/// `DoProcessTIFF`: identifier 0x4F52 or 0x5352 for ORF, 0x55 for RW2/RWL), or a TIFF
/// header on a file named like a TIFF-based RAW.
pub(crate) fn is_camera_raw(bytes: &[u8], path: &Path) -> bool {
    let head = &bytes[..bytes.len().min(4)];
    if matches!(head, b"IIRO" | b"IIRS" | b"MMOR" | b"IIU\0") {
        return true;
    }
    let tiff = head == b"II*\0" || head == b"MM\0*";
    tiff && path.extension().and_then(|e| e.to_str()).is_some_and(|e| {
        TIFF_RAW_EXTENSIONS
            .iter()
            .any(|r| e.eq_ignore_ascii_case(r))
    })
}

struct Tiff<'a> {
    bytes: &'a [u8],
    big_endian: bool,
}

impl Tiff<'_> {
    fn array<const N: usize>(&self, at: usize) -> Option<[u8; N]> {
        self.bytes.get(at..at.checked_add(N)?)?.try_into().ok()
    }

    fn u16_at(&self, at: usize) -> Option<u16> {
        let b = self.array(at)?;
        Some(if self.big_endian {
            u16::from_be_bytes(b)
        } else {
            u16::from_le_bytes(b)
        })
    }

    fn u32_at(&self, at: usize) -> Option<u32> {
        let b = self.array(at)?;
        Some(if self.big_endian {
            u32::from_be_bytes(b)
        } else {
            u32::from_le_bytes(b)
        })
    }

    /// The unsigned values of the entry at `at` (SHORT, LONG or IFD), `None` when the type
    /// is another, the count absurd or the values past the end.
    fn values(&self, at: usize) -> Option<Vec<u32>> {
        let (kind, count) = (self.u16_at(at + 2)?, self.u32_at(at + 4)?);
        let size = match kind {
            3 => 2,
            4 | 13 => 4,
            _ => return None,
        };
        if count == 0 || count > MAX_VALUES {
            return None;
        }
        let total = size * count as usize;
        let start = if total <= 4 {
            at + 8
        } else {
            self.u32_at(at + 8)? as usize
        };
        (0..count as usize)
            .map(|i| {
                let p = start.checked_add(i * size)?;
                if size == 2 {
                    self.u16_at(p).map(u32::from)
                } else {
                    self.u32_at(p)
                }
            })
            .collect()
    }

    fn first(&self, at: usize) -> Option<u32> {
        self.values(at)?.first().copied()
    }
}

/// Walks the directories of a RAW held in `bytes`. Fails only when the header or IFD0
/// cannot be read at all; every other problem leaves that part out.
pub(crate) fn find_previews(bytes: &[u8]) -> Result<Previews, String> {
    let total = bytes.len();
    let big_endian = match bytes.get(..2) {
        Some(b"II") => false,
        Some(b"MM") => true,
        _ => return Err(format!("only {total} bytes, too few for a TIFF header")),
    };
    let tiff = Tiff { bytes, big_endian };
    let ifd0 = tiff
        .u32_at(4)
        .ok_or_else(|| format!("only {total} bytes, too few for a TIFF header"))?
        as usize;
    if tiff.u16_at(ifd0).is_none() {
        return Err(format!(
            "the first directory is at byte {ifd0}, past the end of the file ({total} bytes)"
        ));
    }
    let mut found = Previews::default();
    let cut = |found: &mut Previews, what: String| {
        found
            .cut_short
            .get_or_insert(format!("{what}, past the end of the file ({total} bytes)"));
    };
    let mut queue = vec![ifd0];
    let mut seen = Vec::new();
    while let Some(ifd) = queue.pop() {
        if seen.contains(&ifd) || seen.len() >= MAX_DIRECTORIES {
            continue;
        }
        seen.push(ifd);
        let Some(count) = tiff.u16_at(ifd) else {
            cut(&mut found, format!("a directory at byte {ifd}"));
            continue;
        };
        let entries = ifd + 2;
        let end = entries + 12 * count as usize;
        if end + 4 > total {
            cut(
                &mut found,
                format!("a directory at byte {ifd} with {count} entries"),
            );
            continue;
        }
        let mut dir = Directory::default();
        for at in (entries..end).step_by(12) {
            let tag = tiff.u16_at(at).unwrap_or(0);
            match tag {
                0x0103 => dir.compression = tiff.first(at),
                0x0106 => dir.photometric = tiff.first(at),
                0x0111 => dir.strip_offsets = tiff.values(at),
                0x0117 => dir.strip_counts = tiff.values(at),
                0x0201 => dir.jpeg_offset = tiff.first(at),
                0x0202 => dir.jpeg_length = tiff.first(at),
                0x0112 if ifd == ifd0 => {
                    found.orientation = tiff.first(at).and_then(|o| u8::try_from(o).ok())
                }
                // JpgFromRaw of an RW2: UNDEFINED bytes, the count is the length.
                0x002E if tiff.u16_at(at + 2) == Some(7) => {
                    dir.embedded = tiff.u32_at(at + 8).zip(tiff.u32_at(at + 4))
                }
                0x014A | 0x8769 => {
                    queue.extend(tiff.values(at).into_iter().flatten().map(|o| o as usize))
                }
                _ => {}
            }
        }
        if let Some(next) = tiff.u32_at(end).filter(|&n| n != 0) {
            queue.push(next as usize);
        }
        for (offset, length) in dir.candidates() {
            let (start, len) = (offset as usize, length as usize);
            match start.checked_add(len).filter(|&e| e <= total) {
                Some(stop) if len > 0 => {
                    let range = start..stop;
                    if bytes[range.clone()].starts_with(&[0xFF, 0xD8])
                        && !found.jpegs.contains(&range)
                    {
                        found.jpegs.push(range);
                    }
                }
                Some(_) => {}
                None => cut(
                    &mut found,
                    format!("the preview at byte {start} claims {len} bytes"),
                ),
            }
        }
    }
    found.jpegs.retain(|r| is_dct_jpeg(&bytes[r.clone()]));
    found.jpegs.sort_by_key(|r| std::cmp::Reverse(r.len()));
    Ok(found)
}

#[derive(Default)]
struct Directory {
    compression: Option<u32>,
    photometric: Option<u32>,
    strip_offsets: Option<Vec<u32>>,
    strip_counts: Option<Vec<u32>>,
    jpeg_offset: Option<u32>,
    jpeg_length: Option<u32>,
    /// (offset, length) of an RW2 JpgFromRaw.
    embedded: Option<(u32, u32)>,
}

impl Directory {
    /// (offset, length) pairs that may hold a JPEG.
    fn candidates(&self) -> Vec<(u32, u32)> {
        let mut out: Vec<(u32, u32)> = self.jpeg_offset.zip(self.jpeg_length).into_iter().collect();
        out.extend(self.embedded);
        // 32803 CFA and 34892 LinearRaw are sensor data (DNG 1.7 specification, tag 262).
        let sensor = matches!(self.photometric, Some(32803 | 34892));
        if matches!(self.compression, Some(6 | 7)) && !sensor {
            if let (Some([offset]), Some([length])) =
                (self.strip_offsets.as_deref(), self.strip_counts.as_deref())
            {
                out.push((*offset, *length));
            }
        }
        out
    }
}

/// True when the first frame header of `jpeg` is baseline, extended or progressive DCT
/// (SOF0, SOF1, SOF2; ITU T.81 table B.1), not lossless or arithmetic-coded.
fn is_dct_jpeg(jpeg: &[u8]) -> bool {
    let mut at = 2;
    for _ in 0..256 {
        let (Some(&0xFF), Some(&marker)) = (jpeg.get(at), jpeg.get(at + 1)) else {
            return false;
        };
        match marker {
            0xFF => {
                at += 1;
                continue;
            }
            0xC0..=0xC2 => return true,
            0xC3 | 0xC5..=0xC7 | 0xC9..=0xCB | 0xCD..=0xCF | 0xDA | 0xD9 => return false,
            0x01 | 0xD0..=0xD7 => {
                at += 2;
                continue;
            }
            _ => {}
        }
        let Some(len) = jpeg.get(at + 2..at + 4) else {
            return false;
        };
        at += 2 + u16::from_be_bytes([len[0], len[1]]) as usize;
    }
    false
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A little-endian TIFF: header, then IFD0 at byte 8 with `entries` (tag, type, count,
    /// value), no next directory, then `tail` starting at byte 8 + 2 + 12n + 4.
    fn tiff_le(magic: &[u8; 4], entries: &[(u16, u16, u32, u32)], tail: &[u8]) -> Vec<u8> {
        let mut out = magic.to_vec();
        out.extend(8u32.to_le_bytes());
        out.extend((entries.len() as u16).to_le_bytes());
        for &(tag, kind, count, value) in entries {
            out.extend(tag.to_le_bytes());
            out.extend(kind.to_le_bytes());
            out.extend(count.to_le_bytes());
            out.extend(value.to_le_bytes());
        }
        out.extend(0u32.to_le_bytes());
        out.extend(tail);
        out
    }

    fn data_at(entries: usize) -> u32 {
        (8 + 2 + 12 * entries + 4) as u32
    }

    /// SOI, a SOF marker of the given kind with a dummy body, EOI.
    fn fake_jpeg(sof: u8) -> Vec<u8> {
        vec![0xFF, 0xD8, 0xFF, sof, 0, 4, 0, 0, 0xFF, 0xD9]
    }

    #[test]
    fn recognises_raw_by_header_and_name() {
        // source: ExifTool 12.57 Image/ExifTool.pm DoProcessTIFF (ORF 0x4F52/0x5352, RW2 0x55).
        assert!(is_camera_raw(b"IIRO\x08\0\0\0", Path::new("a.bin")));
        assert!(is_camera_raw(b"IIRS\x08\0\0\0", Path::new("a")));
        assert!(is_camera_raw(b"MMOR\0\0\0\x08", Path::new("a")));
        assert!(is_camera_raw(b"IIU\0\x08\0\0\0", Path::new("a.RW2")));
        assert!(is_camera_raw(b"II*\0\x08\0\0\0", Path::new("x/a.CR2")));
        assert!(is_camera_raw(b"MM\0*\0\0\0\x08", Path::new("a.nef")));
        assert!(!is_camera_raw(b"II*\0\x08\0\0\0", Path::new("a.tif")));
        assert!(!is_camera_raw(b"\xFF\xD8\xFF", Path::new("a.dng")));
        assert!(!is_camera_raw(b"II", Path::new("a.dng")));
    }

    #[test]
    fn collects_jpeg_pointer_and_jpeg_strips_largest_first() {
        let small = fake_jpeg(0xC0);
        let mut big = fake_jpeg(0xC2);
        big.splice(8..8, [0xFF, 0xFE, 0, 6, 1, 2, 3, 4]); // a comment segment
        let base = data_at(5);
        let tail = [small.clone(), big.clone()].concat();
        let bytes = tiff_le(
            b"II*\0",
            &[
                (0x0103, 3, 1, 6),
                (0x0111, 4, 1, base + small.len() as u32),
                (0x0112, 3, 1, 6),
                (0x0117, 4, 1, big.len() as u32),
                (0x0201, 4, 1, base),
            ],
            &tail,
        );
        // The JPEG length is missing: only the strip counts.
        let found = find_previews(&bytes).unwrap();
        assert_eq!(found.jpegs.len(), 1);
        assert_eq!(&bytes[found.jpegs[0].clone()], &big[..]);
        assert_eq!(found.orientation, Some(6));
        assert_eq!(found.cut_short, None);
    }

    #[test]
    fn lossless_sensor_data_and_cfa_strips_are_not_previews() {
        let lossless = fake_jpeg(0xC3);
        let base = data_at(3);
        let bytes = tiff_le(
            b"II*\0",
            &[
                (0x0103, 3, 1, 7),
                (0x0111, 4, 1, base),
                (0x0117, 4, 1, lossless.len() as u32),
            ],
            &lossless,
        );
        assert!(find_previews(&bytes).unwrap().jpegs.is_empty());
        let dct = fake_jpeg(0xC0);
        let cfa = tiff_le(
            b"II*\0",
            &[
                (0x0103, 3, 1, 7),
                (0x0106, 3, 1, 32803),
                (0x0111, 4, 1, data_at(4)),
                (0x0117, 4, 1, dct.len() as u32),
            ],
            &dct,
        );
        assert!(find_previews(&cfa).unwrap().jpegs.is_empty());
    }

    #[test]
    fn damaged_directories_never_panic_and_say_cut_short() {
        // Preview length past the end.
        let jpeg = fake_jpeg(0xC0);
        let base = data_at(2);
        let bytes = tiff_le(
            b"II*\0",
            &[(0x0201, 4, 1, base), (0x0202, 4, 1, 1 << 30)],
            &jpeg,
        );
        let found = find_previews(&bytes).unwrap();
        assert!(found.jpegs.is_empty());
        let said = found.cut_short.unwrap();
        assert!(
            said.contains("claims 1073741824 bytes, past the end"),
            "{said}"
        );
        // IFD0 past the end.
        let err = find_previews(b"II*\0\xFF\xFF\0\0").unwrap_err();
        assert!(err.contains("past the end"), "{err}");
        // A SubIFD pointing back to IFD0 and an absurd count: the loop is cut.
        let looped = tiff_le(
            b"II*\0",
            &[(0x014A, 4, 1, 8), (0x8769, 4, 0xFFFF_FFFF, 8)],
            &[],
        );
        assert_eq!(find_previews(&looped).unwrap(), Previews::default());
        // Every truncation of a valid file.
        let whole = tiff_le(b"IIRO", &[(0x0201, 4, 1, base), (0x0202, 4, 1, 10)], &jpeg);
        assert_eq!(find_previews(&whole).unwrap().jpegs.len(), 1);
        for cut in 0..whole.len() {
            let _ = find_previews(&whole[..cut]);
        }
    }
}
