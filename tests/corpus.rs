//! Pictures made at test time: good ones in every colour layout a collection meets, and
//! damaged ones made from good ones by cutting or overwriting bytes. Nothing here is a
//! hand-edited binary; every file comes from an encoder (or, for camera RAW files, the
//! committed test files and the script that wrote them), then a named change to its bytes.

#![allow(dead_code)]

use std::io::Cursor;

use image::codecs::gif::{GifEncoder, Repeat};
use image::codecs::jpeg::JpegEncoder;
use image::{DynamicImage, Frame, ImageBuffer, Luma, Rgb, RgbImage, Rgba, RgbaImage};

/// A picture with edges and colour, different for every `seed`, so features have
/// something to describe and no two test pictures are alike.
pub fn scene(width: u32, height: u32, seed: u32) -> RgbImage {
    RgbImage::from_fn(width, height, |x, y| {
        let stripe = ((x / 4 + y / 6 + seed) % 3) as u8;
        Rgb([
            ((x * 255) / width.max(1)) as u8 ^ (seed as u8).wrapping_mul(37),
            ((y * 255) / height.max(1)) as u8,
            stripe * 100,
        ])
    })
}

pub fn png(picture: &DynamicImage) -> Vec<u8> {
    let mut out = Cursor::new(Vec::new());
    picture
        .write_to(&mut out, image::ImageFormat::Png)
        .expect("PNG encodes");
    out.into_inner()
}

/// Baseline JPEG (SOF0), quality 90; greyscale pictures stay one-channel.
pub fn jpeg(picture: &DynamicImage) -> Vec<u8> {
    let mut out = Vec::new();
    let mut encoder = JpegEncoder::new_with_quality(&mut out, 90);
    match picture {
        DynamicImage::ImageLuma8(grey) => encoder.encode_image(grey),
        other => encoder.encode_image(&other.to_rgb8()),
    }
    .expect("JPEG encodes");
    out
}

pub fn rgb_png(width: u32, height: u32, seed: u32) -> Vec<u8> {
    png(&DynamicImage::ImageRgb8(scene(width, height, seed)))
}

pub fn rgb_jpeg(width: u32, height: u32, seed: u32) -> Vec<u8> {
    jpeg(&DynamicImage::ImageRgb8(scene(width, height, seed)))
}

pub fn grey_jpeg(width: u32, height: u32) -> Vec<u8> {
    let grey = DynamicImage::ImageRgb8(scene(width, height, 3)).to_luma8();
    jpeg(&DynamicImage::ImageLuma8(grey))
}

pub fn grey_png(width: u32, height: u32) -> Vec<u8> {
    png(&DynamicImage::ImageLuma8(ImageBuffer::from_fn(
        width,
        height,
        |x, y| Luma([((x * 7 + y * 3) % 256) as u8]),
    )))
}

/// 16 bits per channel, RGB.
pub fn rgb16_png(width: u32, height: u32) -> Vec<u8> {
    let deep = ImageBuffer::<Rgb<u16>, _>::from_fn(width, height, |x, y| {
        Rgb([(x * 1000) as u16, (y * 900) as u16, ((x + y) * 500) as u16])
    });
    png(&DynamicImage::ImageRgb16(deep))
}

/// Half transparent, half opaque: the decoder must flatten it.
pub fn rgba_png(width: u32, height: u32) -> Vec<u8> {
    let rgba = RgbaImage::from_fn(width, height, |x, y| {
        Rgba([200, (y * 4) as u8, 40, if x < width / 2 { 0 } else { 255 }])
    });
    png(&DynamicImage::ImageRgba8(rgba))
}

/// Three frames, looping: only the first is expected to be described.
pub fn animated_gif(width: u32, height: u32) -> Vec<u8> {
    let mut out = Vec::new();
    {
        let mut encoder = GifEncoder::new_with_speed(&mut out, 10);
        encoder.set_repeat(Repeat::Infinite).expect("repeat set");
        let frames = (0..3)
            .map(|i| Frame::new(DynamicImage::ImageRgb8(scene(width, height, 10 + i)).to_rgba8()));
        encoder.encode_frames(frames).expect("GIF encodes");
    } // the trailer is written when the encoder is dropped
    out
}

/// A camera RAW test file of crates/collection/testdata/raw (see make_fixtures.py there).
pub fn raw_fixture(name: &str) -> Vec<u8> {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../crates/collection/testdata/raw")
        .join(name);
    std::fs::read(&dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
}

/// CRC-32 as PNG uses it (ISO 3309 / ITU-T V.42 polynomial, PNG specification annex D).
pub fn crc32(bytes: &[u8]) -> u32 {
    let mut crc = 0xFFFF_FFFFu32;
    for &byte in bytes {
        crc ^= u32::from(byte);
        for _ in 0..8 {
            crc = if crc & 1 == 1 {
                0xEDB8_8320 ^ (crc >> 1)
            } else {
                crc >> 1
            };
        }
    }
    !crc
}

/// One PNG chunk: length, type, data, CRC over type and data.
pub fn png_chunk(kind: &[u8; 4], data: &[u8]) -> Vec<u8> {
    let mut body = kind.to_vec();
    body.extend_from_slice(data);
    let mut out = (data.len() as u32).to_be_bytes().to_vec();
    out.extend_from_slice(&body);
    out.extend_from_slice(&crc32(&body).to_be_bytes());
    out
}

const PNG_SIGNATURE: &[u8] = b"\x89PNG\r\n\x1a\n";

/// zlib stream (RFC 1950) holding `data` in stored deflate blocks (RFC 1951 §3.2.4):
/// no compressor needed, every byte where the reader expects it.
fn zlib_stored(data: &[u8]) -> Vec<u8> {
    let mut out = vec![0x78, 0x01];
    let blocks: Vec<&[u8]> = if data.is_empty() {
        vec![&[]]
    } else {
        data.chunks(65_535).collect()
    };
    for (i, block) in blocks.iter().enumerate() {
        out.push(u8::from(i + 1 == blocks.len()));
        let len = block.len() as u16;
        out.extend_from_slice(&len.to_le_bytes());
        out.extend_from_slice(&(!len).to_le_bytes());
        out.extend_from_slice(block);
    }
    let (mut a, mut b) = (1u32, 0u32);
    for &byte in data {
        a = (a + u32::from(byte)) % 65_521;
        b = (b + a) % 65_521;
    }
    out.extend_from_slice(&((b << 16) | a).to_be_bytes());
    out
}

/// An indexed-colour PNG (colour type 3) with a 4-entry palette; the `image` encoder
/// writes no palette PNGs, so this one is assembled chunk by chunk.
pub fn palette_png(width: u32, height: u32) -> Vec<u8> {
    let mut ihdr = width.to_be_bytes().to_vec();
    ihdr.extend_from_slice(&height.to_be_bytes());
    ihdr.extend_from_slice(&[8, 3, 0, 0, 0]);
    let palette = [0, 0, 0, 255, 0, 0, 0, 160, 255, 250, 250, 240];
    let mut rows = Vec::new();
    for y in 0..height {
        rows.push(0); // filter type None
        rows.extend((0..width).map(|x| ((x / 3 + y / 2) % 4) as u8));
    }
    let mut out = PNG_SIGNATURE.to_vec();
    out.extend(png_chunk(b"IHDR", &ihdr));
    out.extend(png_chunk(b"PLTE", &palette));
    out.extend(png_chunk(b"IDAT", &zlib_stored(&rows)));
    out.extend(png_chunk(b"IEND", &[]));
    out
}

/// A PNG whose IHDR declares `width`×`height` 8-bit RGB (with a correct CRC) followed by
/// a few rows of real data: a decompression bomb's promise without its payload.
pub fn png_declaring(width: u32, height: u32) -> Vec<u8> {
    let mut ihdr = width.to_be_bytes().to_vec();
    ihdr.extend_from_slice(&height.to_be_bytes());
    ihdr.extend_from_slice(&[8, 2, 0, 0, 0]);
    let mut out = PNG_SIGNATURE.to_vec();
    out.extend(png_chunk(b"IHDR", &ihdr));
    out.extend(png_chunk(b"IDAT", &zlib_stored(&[0; 4096])));
    out.extend(png_chunk(b"IEND", &[]));
    out
}

/// A real baseline JPEG whose SOF0 frame header is patched to declare `width`×`height`.
pub fn jpeg_declaring(width: u16, height: u16) -> Vec<u8> {
    let mut bytes = rgb_jpeg(16, 16, 5);
    let sof = marker(&bytes, 0xC0).expect("baseline JPEG has SOF0");
    // SOF0: FF C0, length (2), precision (1), height (2), width (2).
    bytes[sof + 5..sof + 7].copy_from_slice(&height.to_be_bytes());
    bytes[sof + 7..sof + 9].copy_from_slice(&width.to_be_bytes());
    bytes
}

/// Offset of the first `FF kind` marker.
pub fn marker(bytes: &[u8], kind: u8) -> Option<usize> {
    bytes.windows(2).position(|w| w == [0xFF, kind])
}

/// The first `keep` of the bytes, as a copy stopped part-way leaves them.
pub fn truncated(bytes: &[u8], keep: f64) -> Vec<u8> {
    bytes[..(bytes.len() as f64 * keep) as usize].to_vec()
}

/// Everything up to and including the start-of-scan header kept; the entropy-coded data
/// replaced by seeded noise of the same length (then the end-of-image marker).
pub fn jpeg_with_garbage_after_header(bytes: &[u8], seed: u64) -> Vec<u8> {
    let sos = marker(bytes, 0xDA).expect("JPEG has a start of scan");
    let header_len = usize::from(u16::from_be_bytes([bytes[sos + 2], bytes[sos + 3]]));
    let data_start = sos + 2 + header_len;
    let mut out = bytes[..data_start].to_vec();
    let mut state = seed;
    out.extend((data_start..bytes.len() - 2).map(|_| (splitmix64(&mut state) >> 56) as u8));
    out.extend_from_slice(&[0xFF, 0xD9]);
    out
}

/// A PNG with one stored CRC flipped (the IDAT's), the data itself intact.
pub fn png_with_bad_crc(bytes: &[u8]) -> Vec<u8> {
    let mut out = bytes.to_vec();
    let idat = out
        .windows(4)
        .position(|w| w == b"IDAT")
        .expect("PNG has IDAT");
    let len = u32::from_be_bytes(out[idat - 4..idat].try_into().unwrap()) as usize;
    let crc_at = idat + 4 + len;
    out[crc_at] ^= 0xFF;
    out
}

/// SplitMix64 (Steele, Lea & Flood 2014): a tiny seeded generator, enough for test noise
/// and kill moments.
pub fn splitmix64(state: &mut u64) -> u64 {
    *state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
    let mut z = *state;
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}
