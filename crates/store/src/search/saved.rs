//! A loaded code index kept in one file beside the database, so the next process reads it
//! in one go instead of walking a million codes and hashing each (the codes beside their
//! hashes). Like the item list it exists only while it is true: every change to the codes
//! deletes it first, and the next load writes it again.

use std::io::Read;
use std::path::{Path, PathBuf};

use super::{CodeIndex, IdTable};

const MAGIC: &[u8; 8] = b"twcodes1";

pub(crate) fn path_in(store_dir: &Path, kind: &str) -> PathBuf {
    store_dir.join(format!("search-{kind}.bin"))
}

fn put_u64(out: &mut Vec<u8>, v: u64) {
    out.extend_from_slice(&v.to_le_bytes());
}

pub(crate) fn encode(index: &CodeIndex) -> Vec<u8> {
    let ids = &index.ids;
    let mut out = Vec::with_capacity(
        64 + index.codes.len() + 4 * index.inv_norms.len() + 8 * index.hashes.len(),
    );
    out.extend_from_slice(MAGIC);
    put_u64(&mut out, index.dim as u64);
    put_u64(&mut out, ids.count as u64);
    for t in &index.thresholds {
        out.extend_from_slice(&t.to_le_bytes());
    }
    put_u64(&mut out, ids.text.len() as u64);
    out.extend_from_slice(ids.text.as_bytes());
    put_u64(&mut out, ids.width.map_or(u64::MAX, |w| w as u64));
    put_u64(&mut out, ids.ends.len() as u64);
    for &end in &ids.ends {
        put_u64(&mut out, end as u64);
    }
    out.push(u8::from(ids.sorted));
    out.extend_from_slice(&index.codes);
    for v in &index.inv_norms {
        out.extend_from_slice(&v.to_le_bytes());
    }
    for h in &index.hashes {
        out.extend_from_slice(&h.to_le_bytes());
    }
    out
}

/// Reads a saved index front to back, each part straight into its own buffer: reading the
/// whole file first held a million-picture index twice (627 MB for `find`) and copied it
/// once more.
struct Cursor {
    file: std::io::BufReader<std::fs::File>,
    /// Bytes not read yet: no part longer than this is believed (a damaged length).
    left: u64,
}

impl Cursor {
    fn open(path: &Path) -> Option<Cursor> {
        let file = std::fs::File::open(path).ok()?;
        let left = file.metadata().ok()?.len();
        Some(Cursor {
            file: std::io::BufReader::with_capacity(1 << 16, file),
            left,
        })
    }

    fn take(&mut self, n: usize) -> Option<Vec<u8>> {
        let len = u64::try_from(n).ok().filter(|&len| len <= self.left)?;
        let mut out = vec![0u8; n];
        self.file.read_exact(&mut out).ok()?;
        self.left -= len;
        Some(out)
    }

    fn u64(&mut self) -> Option<u64> {
        Some(u64::from_le_bytes(self.take(8)?.try_into().ok()?))
    }

    fn usize(&mut self) -> Option<usize> {
        usize::try_from(self.u64()?).ok()
    }

    fn f32s(&mut self, n: usize) -> Option<Vec<f32>> {
        let bytes = self.take(n.checked_mul(4)?)?;
        Some(
            bytes
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect(),
        )
    }

    fn is_done(&self) -> bool {
        self.left == 0
    }
}

/// The index saved at `path` if it is whole and was hashed against `thresholds`; `None`
/// otherwise (the codes are then read from the store).
pub(crate) fn read(path: &Path, thresholds: &[f32]) -> Option<CodeIndex> {
    let mut at = Cursor::open(path)?;
    if at.take(MAGIC.len())? != MAGIC.as_slice() {
        return None;
    }
    let dim = at.usize()?;
    let count = at.usize()?;
    if dim != thresholds.len() || at.f32s(dim)?.as_slice() != thresholds {
        return None;
    }
    let text_len = at.usize()?;
    let text = String::from_utf8(at.take(text_len)?).ok()?;
    let width = match at.u64()? {
        u64::MAX => None,
        w => Some(usize::try_from(w).ok()?),
    };
    let n_ends = at.usize()?;
    let ends = (0..n_ends)
        .map(|_| at.usize())
        .collect::<Option<Vec<usize>>>()?;
    let sorted = at.take(1)?[0] == 1;
    let words = dim.div_ceil(64);
    let codes = at.take(count.checked_mul(dim)?)?;
    let inv_norms = at.f32s(count)?;
    let hash_bytes = at.take(count.checked_mul(words)?.checked_mul(8)?)?;
    let hashes = hash_bytes
        .chunks_exact(8)
        .map(|c| u64::from_le_bytes(c.try_into().unwrap_or_default()))
        .collect();
    let whole = at.is_done()
        && match width {
            Some(w) => text.len() == w.checked_mul(count)? && ends.is_empty(),
            None => {
                ends.len() == count
                    && ends.last().copied().unwrap_or(0) == text.len()
                    && ends.windows(2).all(|w| w[0] <= w[1])
                    && ends.iter().all(|&e| text.is_char_boundary(e))
            }
        };
    whole.then(|| CodeIndex {
        dim,
        words,
        codes,
        inv_norms,
        hashes,
        thresholds: thresholds.to_vec(),
        ids: IdTable {
            text,
            width,
            ends,
            count,
            sorted,
        },
    })
}
