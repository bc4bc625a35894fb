//! How a vector is laid out as bytes in the store: compact where the loss is measured to be
//! harmless, exact otherwise. The first byte says which layout follows, so reading never
//! needs to know which kind a vector is.
//!
//! - codes (shared-layer probabilities, all in [0, 1]) as one byte each, `round(v · 255)`:
//!   exactly the bytes the code search keeps anyway (error ≤ 1/510);
//! - features in blocks of [`BLOCK`] values, each block as its smallest value and its step
//!   (two `f32`) and one byte per value, `round((v − min) / step)`, `step = (max − min) / 255`
//!   (block-wise 8-bit quantisation, common practice for embedding vectors): 1.25 bytes a
//!   value instead of 4, error ≤ step / 2. Measured on the shared sets (BENCHMARKS.md,
//!   "Store size"): kNN tag transfer LRAP moved by at most 0.001;
//! - anything else, and any vector holding a value the compact layouts cannot (not finite,
//!   or a "code" outside [0, 1]), as little-endian `f32`.

use crate::layout::{CODES, FEATURES};

/// Values per block of the block layout.
pub const BLOCK: usize = 32;

const EXACT: u8 = 0;
const UNIT_BYTES: u8 = 1;
const BLOCKS: u8 = 2;

/// The stored bytes of `values`, a vector of `kind`.
pub fn pack(kind: &str, values: &[f32]) -> Vec<u8> {
    let finite = values.iter().all(|v| v.is_finite());
    match kind {
        CODES if finite && values.iter().all(|v| (0.0..=1.0).contains(v)) => {
            let mut bytes = Vec::with_capacity(1 + values.len());
            bytes.push(UNIT_BYTES);
            bytes.extend(values.iter().map(|&v| unit_byte(v)));
            bytes
        }
        FEATURES if finite => pack_blocks(values),
        _ => {
            let mut bytes = Vec::with_capacity(1 + 4 * values.len());
            bytes.push(EXACT);
            bytes.extend(values.iter().flat_map(|v| v.to_le_bytes()));
            bytes
        }
    }
}

/// One value of [0, 1] as a byte, as the code search quantises it.
pub(crate) fn unit_byte(v: f32) -> u8 {
    (v * 255.0).round() as u8
}

fn pack_blocks(values: &[f32]) -> Vec<u8> {
    let blocks = values.len().div_ceil(BLOCK);
    let mut bytes = Vec::with_capacity(5 + 8 * blocks + values.len());
    bytes.push(BLOCKS);
    bytes.extend((values.len() as u32).to_le_bytes());
    for block in values.chunks(BLOCK) {
        let min = block.iter().copied().fold(f32::INFINITY, f32::min);
        let max = block.iter().copied().fold(f32::NEG_INFINITY, f32::max);
        let step = (max - min) / 255.0;
        bytes.extend(min.to_le_bytes());
        bytes.extend(step.to_le_bytes());
        bytes.extend(block.iter().map(|&v| {
            if step > 0.0 {
                ((v - min) / step).round().clamp(0.0, 255.0) as u8
            } else {
                0
            }
        }));
    }
    bytes
}

/// The bytes of a vector kept as unit bytes (one byte a value of [0, 1]); `None` for any
/// other layout.
pub(crate) fn unit_bytes(bytes: &[u8]) -> Option<&[u8]> {
    match bytes.split_first() {
        Some((&UNIT_BYTES, body)) => Some(body),
        _ => None,
    }
}

/// The values of stored bytes, or what is wrong with them.
pub fn unpack(bytes: &[u8]) -> Result<Vec<f32>, &'static str> {
    let (&layout, body) = bytes.split_first().ok_or("an empty vector entry")?;
    match layout {
        EXACT => {
            if body.len() % 4 != 0 {
                return Err("vector length is not a multiple of 4 bytes");
            }
            Ok(body
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect())
        }
        UNIT_BYTES => Ok(body.iter().map(|&b| f32::from(b) / 255.0).collect()),
        BLOCKS => unpack_blocks(body),
        _ => Err("an unknown vector layout"),
    }
}

fn unpack_blocks(body: &[u8]) -> Result<Vec<f32>, &'static str> {
    let (len, mut rest) = body.split_first_chunk::<4>().ok_or("a cut-short vector")?;
    let len = u32::from_le_bytes(*len) as usize;
    let mut values = Vec::with_capacity(len);
    while values.len() < len {
        let in_block = BLOCK.min(len - values.len());
        let (head, tail) = rest.split_first_chunk::<8>().ok_or("a cut-short vector")?;
        let min = f32::from_le_bytes([head[0], head[1], head[2], head[3]]);
        let step = f32::from_le_bytes([head[4], head[5], head[6], head[7]]);
        if tail.len() < in_block {
            return Err("a cut-short vector");
        }
        let (block, after) = tail.split_at(in_block);
        values.extend(block.iter().map(|&q| min + f32::from(q) * step));
        rest = after;
    }
    if !rest.is_empty() {
        return Err("a vector with bytes past its end");
    }
    Ok(values)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn codes_are_the_bytes_the_code_search_keeps() {
        let code = [0.0, 1.0, 0.5, 0.25, 0.999];
        let bytes = pack(CODES, &code);
        assert_eq!(bytes.len(), 1 + code.len());
        // by hand: round(v · 255) → 0, 255, 128 (127.5 rounds away from zero), 64, 255.
        assert_eq!(&bytes[1..], &[0, 255, 128, 64, 255]);
        let back = unpack(&bytes).unwrap();
        for (a, b) in code.iter().zip(&back) {
            assert!((a - b).abs() <= 1.0 / 510.0 + 1e-7, "{a} {b}");
        }
        // A "code" outside [0, 1] is kept exactly rather than clamped.
        assert_eq!(unpack(&pack(CODES, &[1.5, -0.5])).unwrap(), [1.5, -0.5]);
    }

    #[test]
    fn features_take_a_quarter_and_a_bit_of_the_bytes() {
        let features: Vec<f32> = (0..3700)
            .map(|i| ((i * 37) % 101) as f32 / 50.0 - 1.0)
            .collect();
        let bytes = pack(FEATURES, &features);
        // by hand: 1 + 4 header bytes, 116 blocks (3700 / 32, rounded up) of 8 bytes, 3700.
        assert_eq!(bytes.len(), 5 + 116 * 8 + 3700);
        // Other kinds, and features that are not all finite, are kept exactly.
        assert_eq!(unpack(&pack("other", &features)).unwrap(), features);
        let odd = [1.0, f32::NAN, 2.0];
        let back = unpack(&pack(FEATURES, &odd)).unwrap();
        assert!(back[1].is_nan() && back[0] == 1.0 && back[2] == 2.0);
    }

    #[test]
    fn damaged_entries_are_refused_not_guessed() {
        assert!(unpack(&[]).is_err());
        assert!(unpack(&[9, 1, 2]).is_err());
        assert!(unpack(&[EXACT, 1, 2, 3]).is_err());
        let good = pack(FEATURES, &[0.5; 40]);
        assert!(unpack(&good[..good.len() - 1]).is_err());
        let mut long = good.clone();
        long.push(0);
        assert!(unpack(&long).is_err());
        assert!(unpack(&[BLOCKS, 200, 0, 0, 0]).is_err());
    }

    proptest! {
        #[test]
        fn block_error_is_at_most_half_a_step(values in proptest::collection::vec(-4.0f32..4.0, 0..200)) {
            let back = unpack(&pack(FEATURES, &values)).unwrap();
            prop_assert_eq!(back.len(), values.len());
            for (block, got) in values.chunks(BLOCK).zip(back.chunks(BLOCK)) {
                let min = block.iter().copied().fold(f32::INFINITY, f32::min);
                let max = block.iter().copied().fold(f32::NEG_INFINITY, f32::max);
                let half_step = (max - min) / 510.0;
                for (a, b) in block.iter().zip(got) {
                    prop_assert!((a - b).abs() <= half_step * 1.001 + 1e-6, "{} {}", a, b);
                }
            }
        }
    }
}
