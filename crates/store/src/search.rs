//! Finds the items whose codes are most similar (cosine) to a query code, fast enough for a
//! million items on two cores.
//!
//! A code is the model's shared-layer probabilities, `dim` values in [0, 1]. The index keeps
//! each value as one byte (`round(value · 255)`, error ≤ 1/510) so a million 256-unit codes
//! fit in 256 MB instead of 1 GB, and keeps a binary hash per code (bit j = value above the
//! unit's median) packed in 64-bit words. Two ways to search:
//!
//! - [`SearchMode::Exact`]: cosine against every code (integer dot products over the bytes).
//! - [`SearchMode::Prefiltered`]: Hamming distance to every hash (32 bytes per code instead of
//!   256), keep the nearest `candidates`, and rank only those by exact cosine.
//!
//! Similarities are computed from integers only, so every path, thread count and CPU gives
//! the same numbers; equal similarities are ordered by row.

mod kernels;
mod saved;
#[cfg(test)]
mod tests;

pub(crate) use saved::path_in as saved_path;

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use rayon::prelude::*;

use crate::{PackedVector, Result, Store, StoreError, VectorReader};

/// Candidates kept by the Hamming pre-filter when the caller has no better idea. On
/// 1,000,000 synthetic 256-unit codes (`tools/code-search-bench`) recall@10 against exact
/// search was 0.969 / 0.992 / 0.999 / 1.0 at 2k / 5k / 10k / 20k candidates; 10k leaves
/// margin for real codes that cluster less, for about 1.3 ms of re-ranking.
pub const DEFAULT_CANDIDATES: usize = 10_000;

/// Largest code length accepted; far above any model we train, it keeps the integer dot
/// products and the u16 Hamming distances safely in range.
pub const MAX_DIM: usize = 4096;

/// Rows per parallel task in the exact scan (2 MB of 256-byte codes).
const EXACT_CHUNK_ROWS: usize = 8192;
/// Rows per parallel task in the Hamming scan.
const HAMMING_CHUNK_ROWS: usize = 16_384;
/// Candidates per parallel task when re-ranking.
const RERANK_CHUNK: usize = 2048;
/// How many candidates ahead the re-rank asks the memory for its rows: the rows are
/// scattered over hundreds of MB, so each one is a cache (and TLB) miss otherwise waited for.
const PREFETCH_AHEAD: usize = 8;

/// How to search; see the module documentation.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SearchMode {
    /// Cosine against every code.
    Exact,
    /// Hamming pre-filter to `candidates` codes (at least `k`), then exact cosine on those.
    Prefiltered { candidates: usize },
}

impl Default for SearchMode {
    fn default() -> Self {
        SearchMode::Prefiltered {
            candidates: DEFAULT_CANDIDATES,
        }
    }
}

/// One search result.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Hit<'a> {
    /// Position of the item in the index (the order codes were added in).
    pub row: usize,
    pub id: &'a str,
    /// Cosine similarity of the query and the stored (byte-quantised) code; 0 when either
    /// is all zeros.
    pub similarity: f32,
}

/// Item codes held compactly in memory for similarity search.
#[derive(Clone, Debug, PartialEq)]
pub struct CodeIndex {
    dim: usize,
    /// u64 words per hash.
    words: usize,
    /// Row-major `len × dim`, `round(value · 255)`.
    codes: Vec<u8>,
    /// 1 / ‖row‖ of the byte code, 0 for an all-zero row.
    inv_norms: Vec<f32>,
    /// Row-major `len × words`; bit j of a row is `code[j] > thresholds[j]`.
    hashes: Vec<u64>,
    thresholds: Vec<f32>,
    ids: IdTable,
}

/// Adds codes one at a time, so loading from the store never holds the float codes at once.
pub struct CodeIndexBuilder {
    index: CodeIndex,
    /// Per unit, the smallest byte `b` whose value `b / 255` lies above the unit's hash
    /// threshold (256: none), so a code kept as bytes hashes as its values would.
    lowest_byte_above: Vec<u16>,
}

/// Codes read from the store at once while the search loads (16 MB of 256-unit codes).
const LOAD_BATCH: usize = 65_536;

impl CodeIndexBuilder {
    /// An empty index for codes of `dim` units hashed against `hash_thresholds` (one per unit).
    pub fn new(dim: usize, hash_thresholds: &[f32]) -> Result<Self> {
        check_shape(dim, hash_thresholds)?;
        Ok(CodeIndexBuilder {
            index: CodeIndex {
                dim,
                words: dim.div_ceil(64),
                codes: Vec::new(),
                inv_norms: Vec::new(),
                hashes: Vec::new(),
                thresholds: hash_thresholds.to_vec(),
                ids: IdTable::default(),
            },
            lowest_byte_above: hash_thresholds
                .iter()
                .map(|&t| {
                    (0..=255u16)
                        .find(|&b| f32::from(b as u8) / 255.0 > t)
                        .unwrap_or(256)
                })
                .collect(),
        })
    }

    /// Adds one item's code; refuses codes of the wrong length or with values outside [0, 1].
    pub fn push(&mut self, id: &str, code: &[f32]) -> Result<()> {
        check_code(id, code, self.index.dim)?;
        self.index.add_row(id, |thresholds, out, hash| {
            encode_row(code, thresholds, out, hash)
        })
    }

    /// Adds one item's code as the store keeps it. Codes kept as unit bytes are taken as
    /// they are (the bytes `push` would make of their values, and the same hash bits);
    /// any other is read as values first.
    pub(crate) fn push_packed(
        &mut self,
        id: &str,
        packed: &PackedVector,
        reader: &VectorReader,
    ) -> Result<()> {
        let bytes = match packed.unit_bytes() {
            Some(bytes) if bytes.len() == self.index.dim => bytes,
            _ => return self.push(id, &packed.values(&reader.dir, id)?),
        };
        let lowest_byte_above = &self.lowest_byte_above;
        self.index.add_row(id, |_, out, hash| {
            out.copy_from_slice(bytes);
            let mut squares = 0u64;
            for (j, (&b, &lowest_above)) in bytes.iter().zip(lowest_byte_above).enumerate() {
                squares += u64::from(b) * u64::from(b);
                if u16::from(b) >= lowest_above {
                    hash[j / 64] |= 1 << (j % 64);
                }
            }
            inv_sqrt(squares as f64)
        })
    }

    /// The finished index, trimmed to its size.
    pub fn finish(mut self) -> CodeIndex {
        let index = &mut self.index;
        index.codes.shrink_to_fit();
        index.inv_norms.shrink_to_fit();
        index.hashes.shrink_to_fit();
        index.ids.finish();
        self.index
    }
}

impl CodeIndex {
    /// Appends one row: `encode` fills its code bytes and zeroed hash words (given the
    /// thresholds) and returns 1 / ‖code‖.
    fn add_row(
        &mut self,
        id: &str,
        encode: impl FnOnce(&[f32], &mut [u8], &mut [u64]) -> f32,
    ) -> Result<()> {
        if self.len() >= u32::MAX as usize {
            return Err(too_many_rows());
        }
        let row_start = self.codes.len();
        self.codes.resize(row_start + self.dim, 0);
        let hash_start = self.hashes.len();
        self.hashes.resize(hash_start + self.words, 0);
        let inv_norm = encode(
            &self.thresholds,
            &mut self.codes[row_start..],
            &mut self.hashes[hash_start..],
        );
        self.inv_norms.push(inv_norm);
        self.ids.push(id);
        Ok(())
    }

    /// Builds the index from `ids.len()` codes laid out row-major in `codes` (`dim` values per
    /// row, each in [0, 1]) and one hash threshold per unit.
    pub fn build(
        ids: Vec<String>,
        codes: &[f32],
        dim: usize,
        hash_thresholds: &[f32],
    ) -> Result<CodeIndex> {
        check_shape(dim, hash_thresholds)?;
        let n = ids.len();
        if codes.len() != n * dim {
            return Err(StoreError::BadIndexShape {
                detail: format!(
                    "{} code values given for {n} ids of {dim} units (expected {})",
                    codes.len(),
                    n * dim
                ),
            });
        }
        if n > u32::MAX as usize {
            return Err(too_many_rows());
        }
        // The first bad row (not just any) so the message is the same on every run.
        if let Some(bad) = codes
            .par_chunks(dim)
            .position_first(|code| code.iter().any(|v| !(0.0..=1.0).contains(v)))
        {
            check_code(&ids[bad], &codes[bad * dim..(bad + 1) * dim], dim)?;
        }
        let words = dim.div_ceil(64);
        let mut quantised = vec![0u8; n * dim];
        let mut hashes = vec![0u64; n * words];
        let mut inv_norms = vec![0f32; n];
        quantised
            .par_chunks_mut(dim)
            .zip(hashes.par_chunks_mut(words))
            .zip(inv_norms.par_iter_mut())
            .zip(codes.par_chunks(dim))
            .for_each(|(((out, hash), inv_norm), code)| {
                *inv_norm = encode_row(code, hash_thresholds, out, hash);
            });
        let mut table = IdTable::default();
        for id in &ids {
            table.push(id);
        }
        table.finish();
        Ok(CodeIndex {
            dim,
            words,
            codes: quantised,
            inv_norms,
            hashes,
            thresholds: hash_thresholds.to_vec(),
            ids: table,
        })
    }

    /// Builds the index from every vector of `kind` in the store (in id order), streaming so
    /// the float codes are never all in memory at once.
    pub fn load(store: &Store, kind: &str, hash_thresholds: &[f32]) -> Result<CodeIndex> {
        CodeIndex::load_from(&store.vector_reader(kind)?, hash_thresholds)
    }

    /// [`Self::load`] through a reader of the codes' kind (while its store is open).
    /// The index saved beside the database when there is one (and it was hashed alike),
    /// else built from the codes and saved for the next load.
    pub fn load_from(codes: &VectorReader, hash_thresholds: &[f32]) -> Result<CodeIndex> {
        let path = saved::path_in(&codes.dir, &codes.kind);
        if let Some(index) = saved::read(&path, hash_thresholds) {
            return Ok(index);
        }
        let seen = codes.changes.seen();
        let index = CodeIndex::build_from(codes, hash_thresholds)?;
        codes
            .changes
            .write_if_unchanged(seen, &path, &saved::encode(&index));
        Ok(index)
    }

    fn build_from(codes: &VectorReader, hash_thresholds: &[f32]) -> Result<CodeIndex> {
        let mut builder = CodeIndexBuilder::new(hash_thresholds.len(), hash_thresholds)?;
        codes.packed_in_batches(LOAD_BATCH, |batch| {
            for (id, packed) in batch {
                builder.push_packed(&id, &packed, codes)?;
            }
            Ok(())
        })?;
        Ok(builder.finish())
    }

    /// Number of items.
    pub fn len(&self) -> usize {
        self.inv_norms.len()
    }

    pub fn is_empty(&self) -> bool {
        self.inv_norms.is_empty()
    }

    /// Units per code (also the number of hash bits).
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Heap bytes held by the index (codes, norms, hashes, ids), for capacity planning.
    pub fn memory_bytes(&self) -> usize {
        std::mem::size_of::<Self>()
            + self.codes.capacity()
            + self.inv_norms.capacity() * std::mem::size_of::<f32>()
            + self.hashes.capacity() * std::mem::size_of::<u64>()
            + self.thresholds.capacity() * std::mem::size_of::<f32>()
            + self.ids.memory_bytes()
    }

    /// The id of the item at `row`. Panics when `row >= len()` (a caller bug, like slicing).
    pub fn id(&self, row: usize) -> &str {
        self.ids.get(row)
    }

    /// The row of an item, to exclude it from its own search or to use its code as a query.
    pub fn row_of(&self, id: &str) -> Option<usize> {
        self.ids.find(id)
    }

    /// The stored code of `row` as floats (`byte / 255`). Panics when `row >= len()`.
    pub fn code(&self, row: usize) -> Vec<f32> {
        self.codes[row * self.dim..(row + 1) * self.dim]
            .iter()
            .map(|&b| f32::from(b) / 255.0)
            .collect()
    }

    /// The `k` items most similar to `query`, best first.
    pub fn search(&self, query: &[f32], k: usize, mode: SearchMode) -> Result<Vec<Hit<'_>>> {
        self.run(query, k, mode, &|_| true, false)
    }

    /// Like [`search`](Self::search), over only the rows for which `keep(row)` is true (for
    /// example "untagged items" or "not the query item"). The pre-filter picks its
    /// candidates among kept rows, so a strict filter still gets a full candidate list.
    pub fn search_where<F>(
        &self,
        query: &[f32],
        k: usize,
        mode: SearchMode,
        keep: F,
    ) -> Result<Vec<Hit<'_>>>
    where
        F: Fn(usize) -> bool + Sync,
    {
        self.run(query, k, mode, &keep, true)
    }

    fn run<F>(
        &self,
        query: &[f32],
        k: usize,
        mode: SearchMode,
        keep: &F,
        filtered: bool,
    ) -> Result<Vec<Hit<'_>>>
    where
        F: Fn(usize) -> bool + Sync,
    {
        let query = self.prepare(query)?;
        if k == 0 || self.is_empty() {
            return Ok(Vec::new());
        }
        let best = match mode {
            SearchMode::Exact => self.exact(&query, k, keep),
            SearchMode::Prefiltered { candidates } => {
                let rows = self.prefilter(&query, candidates.max(k), keep, filtered);
                self.rerank(&query, &rows, k)
            }
        };
        Ok(best
            .into_iter()
            .map(|s| Hit {
                row: s.row as usize,
                id: self.ids.get(s.row as usize),
                similarity: s.similarity,
            })
            .collect())
    }

    fn prepare(&self, query: &[f32]) -> Result<Query> {
        if query.len() != self.dim {
            return Err(StoreError::BadQuery {
                detail: format!(
                    "it has {} values, the indexed codes have {}",
                    query.len(),
                    self.dim
                ),
            });
        }
        if let Some(unit) = query.iter().position(|v| !v.is_finite()) {
            return Err(StoreError::BadQuery {
                detail: format!("value {} at unit {unit} is not a number", query[unit]),
            });
        }
        // Scale to the widest i16 range for which no dot product of 255-valued bytes can
        // overflow an i32: the query keeps ~15 bits, far finer than the stored bytes.
        let limit = (i32::MAX as usize / (255 * self.dim)).min(i16::MAX as usize) as f64;
        let max_abs = query.iter().fold(0f64, |m, &v| m.max(f64::from(v.abs())));
        let ints: Vec<i16> = if max_abs == 0.0 {
            vec![0; self.dim]
        } else {
            let scale = limit / max_abs;
            query
                .iter()
                .map(|&v| (f64::from(v) * scale).round() as i16)
                .collect()
        };
        let squares: i64 = ints.iter().map(|&v| i64::from(v) * i64::from(v)).sum();
        let mut hash = vec![0u64; self.words];
        for (j, (&v, &t)) in query.iter().zip(&self.thresholds).enumerate() {
            if v > t {
                hash[j / 64] |= 1 << (j % 64);
            }
        }
        Ok(Query {
            ints,
            inv_norm: inv_sqrt(squares as f64),
            hash,
        })
    }

    fn exact<F>(&self, query: &Query, k: usize, keep: &F) -> Vec<Scored>
    where
        F: Fn(usize) -> bool + Sync,
    {
        let dim = self.dim;
        let tops: Vec<Vec<Scored>> = self
            .codes
            .par_chunks(EXACT_CHUNK_ROWS * dim)
            .enumerate()
            .map(|(chunk, rows)| {
                let first = chunk * EXACT_CHUNK_ROWS;
                let mut dots = vec![0i32; rows.len() / dim];
                kernels::dots(rows, dim, &query.ints, &mut dots);
                let mut top = TopK::new(k);
                for (i, (&dot, &inv_norm)) in dots
                    .iter()
                    .zip(&self.inv_norms[first..first + dots.len()])
                    .enumerate()
                {
                    let row = first + i;
                    if keep(row) {
                        top.push(Scored {
                            similarity: similarity(dot, query.inv_norm, inv_norm),
                            row: row as u32,
                        });
                    }
                }
                top.heap.into_vec()
            })
            .collect();
        merge(tops, k)
    }

    /// The `candidates` kept rows nearest in Hamming distance, ties broken by row, in row
    /// order. Counting distances (at most dim + 1 values) replaces any sort.
    fn prefilter<F>(&self, query: &Query, candidates: usize, keep: &F, filtered: bool) -> Vec<u32>
    where
        F: Fn(usize) -> bool + Sync,
    {
        let bits = self.dim;
        let excluded = (bits + 1) as u16;
        let words = self.words;
        let mut distances = vec![0u16; self.len()];
        let histogram = distances
            .par_chunks_mut(HAMMING_CHUNK_ROWS)
            .zip(self.hashes.par_chunks(HAMMING_CHUNK_ROWS * words))
            .enumerate()
            .map(|(chunk, (out, hashes))| {
                kernels::hamming(hashes, words, &query.hash, out);
                if filtered {
                    let first = chunk * HAMMING_CHUNK_ROWS;
                    for (i, d) in out.iter_mut().enumerate() {
                        if !keep(first + i) {
                            *d = excluded;
                        }
                    }
                }
                let mut counts = vec![0u32; bits + 2];
                for &d in out.iter() {
                    counts[usize::from(d)] += 1;
                }
                counts
            })
            .reduce(
                || vec![0u32; bits + 2],
                |mut a, b| {
                    a.iter_mut().zip(&b).for_each(|(x, y)| *x += y);
                    a
                },
            );
        // Every row nearer than `limit` is taken, then rows at `limit` in row order.
        let mut taken = 0usize;
        let mut limit = bits;
        let mut at_limit = histogram[bits] as usize;
        for (d, &count) in histogram[..=bits].iter().enumerate() {
            let count = count as usize;
            if taken + count >= candidates {
                limit = d;
                at_limit = candidates - taken;
                break;
            }
            taken += count;
        }
        let limit = limit as u16;
        let parts: Vec<(Vec<u32>, Vec<u32>)> = distances
            .par_chunks(HAMMING_CHUNK_ROWS)
            .enumerate()
            .map(|(chunk, ds)| {
                let first = chunk * HAMMING_CHUNK_ROWS;
                let mut below = Vec::new();
                let mut at = Vec::new();
                for (i, &d) in ds.iter().enumerate() {
                    if d < limit {
                        below.push((first + i) as u32);
                    } else if d == limit && at.len() < at_limit {
                        at.push((first + i) as u32);
                    }
                }
                (below, at)
            })
            .collect();
        let mut rows: Vec<u32> = Vec::with_capacity(candidates);
        for (below, _) in &parts {
            rows.extend_from_slice(below);
        }
        let mut need = at_limit;
        for (_, at) in &parts {
            let take = need.min(at.len());
            rows.extend_from_slice(&at[..take]);
            need -= take;
        }
        rows
    }

    fn rerank(&self, query: &Query, rows: &[u32], k: usize) -> Vec<Scored> {
        let dim = self.dim;
        let tops: Vec<Vec<Scored>> = rows
            .par_chunks(RERANK_CHUNK)
            .map(|chunk| {
                let mut top = TopK::new(k);
                let mut dot = [0i32];
                for (i, &row) in chunk.iter().enumerate() {
                    if let Some(&ahead) = chunk.get(i + PREFETCH_AHEAD) {
                        let a = ahead as usize;
                        kernels::prefetch(&self.codes[a * dim..(a + 1) * dim]);
                        kernels::prefetch(&self.inv_norms[a..a + 1]);
                    }
                    let r = row as usize;
                    kernels::dots(
                        &self.codes[r * dim..(r + 1) * dim],
                        dim,
                        &query.ints,
                        &mut dot,
                    );
                    top.push(Scored {
                        similarity: similarity(dot[0], query.inv_norm, self.inv_norms[r]),
                        row,
                    });
                }
                top.heap.into_vec()
            })
            .collect();
        merge(tops, k)
    }
}

/// A query turned into what the scans compare against.
struct Query {
    ints: Vec<i16>,
    inv_norm: f32,
    hash: Vec<u64>,
}

/// Cosine from the integer dot product and the two inverse norms. One function everywhere,
/// so every path gives bit-identical similarities.
#[inline(always)]
fn similarity(dot: i32, inv_query: f32, inv_row: f32) -> f32 {
    (f64::from(dot) * f64::from(inv_query) * f64::from(inv_row)).clamp(-1.0, 1.0) as f32
}

fn inv_sqrt(squares: f64) -> f32 {
    if squares == 0.0 {
        0.0
    } else {
        (1.0 / squares.sqrt()) as f32
    }
}

/// Quantises one code into `out`, sets its hash bits, and returns 1 / ‖byte code‖.
fn encode_row(code: &[f32], thresholds: &[f32], out: &mut [u8], hash: &mut [u64]) -> f32 {
    hash.fill(0);
    let mut squares = 0u64;
    for (j, ((&v, &t), o)) in code.iter().zip(thresholds).zip(out.iter_mut()).enumerate() {
        let b = quantise(v);
        *o = b;
        squares += u64::from(b) * u64::from(b);
        if v > t {
            hash[j / 64] |= 1 << (j % 64);
        }
    }
    inv_sqrt(squares as f64)
}

/// A probability in [0, 1] as the nearest of 256 evenly spaced levels.
#[inline(always)]
fn quantise(v: f32) -> u8 {
    crate::packing::unit_byte(v)
}

fn check_shape(dim: usize, thresholds: &[f32]) -> Result<()> {
    if dim == 0 || dim > MAX_DIM {
        return Err(StoreError::BadIndexShape {
            detail: format!("codes of {dim} units; the index takes 1 to {MAX_DIM}"),
        });
    }
    if thresholds.len() != dim {
        return Err(StoreError::BadIndexShape {
            detail: format!(
                "{} hash thresholds for codes of {dim} units; the model gives one per unit",
                thresholds.len()
            ),
        });
    }
    if let Some(unit) = thresholds.iter().position(|t| !t.is_finite()) {
        return Err(StoreError::BadIndexShape {
            detail: format!(
                "hash threshold {} of unit {unit} is not a number; retrain the model",
                thresholds[unit]
            ),
        });
    }
    Ok(())
}

fn check_code(id: &str, code: &[f32], dim: usize) -> Result<()> {
    if code.len() != dim {
        return Err(StoreError::BadCode {
            id: id.to_string(),
            detail: format!("it has {} values, the model has {dim} units", code.len()),
        });
    }
    if let Some(unit) = code.iter().position(|v| !(0.0..=1.0).contains(v)) {
        return Err(StoreError::BadCode {
            id: id.to_string(),
            detail: format!(
                "value {} at unit {unit} is not a probability in [0, 1]",
                code[unit]
            ),
        });
    }
    Ok(())
}

fn too_many_rows() -> StoreError {
    StoreError::BadIndexShape {
        detail: format!("more than {} codes; split the collection", u32::MAX),
    }
}

/// A scored row. `Ord` puts the *worse* one first-greater, so a `BinaryHeap` keeps the
/// worst kept row on top and a sorted vector lists the best first.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Scored {
    similarity: f32,
    row: u32,
}

impl Eq for Scored {}

impl Ord for Scored {
    fn cmp(&self, other: &Self) -> Ordering {
        other
            .similarity
            .total_cmp(&self.similarity)
            .then(self.row.cmp(&other.row))
    }
}

impl PartialOrd for Scored {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

/// The best `k` rows seen so far.
struct TopK {
    k: usize,
    heap: BinaryHeap<Scored>,
}

impl TopK {
    fn new(k: usize) -> Self {
        TopK {
            k,
            heap: BinaryHeap::with_capacity(k.min(4096) + 1),
        }
    }

    #[inline(always)]
    fn push(&mut self, item: Scored) {
        if self.heap.len() < self.k {
            self.heap.push(item);
        } else if let Some(mut worst) = self.heap.peek_mut() {
            if item < *worst {
                *worst = item;
            }
        }
    }
}

/// The best `k` of the per-task winners, best first. The order is total (rows are unique),
/// so the result does not depend on how rows were split between tasks.
fn merge(tops: Vec<Vec<Scored>>, k: usize) -> Vec<Scored> {
    let mut all: Vec<Scored> = tops.into_iter().flatten().collect();
    if all.len() > k {
        all.select_nth_unstable(k - 1);
        all.truncate(k);
    }
    all.sort_unstable();
    all
}

/// Ids stored back to back in one string: a million 16-character ids take 16 MB instead of
/// ~40 MB as separate `String`s. Equal-length ids (the usual case) need no offsets.
#[derive(Clone, Debug, Default, PartialEq)]
struct IdTable {
    text: String,
    /// Length shared by every id so far; `None` once lengths differ (then `ends` is used).
    width: Option<usize>,
    /// End offset of every id, only filled once lengths differ.
    ends: Vec<usize>,
    count: usize,
    /// Whether ids arrived in ascending order, which lets `find` bisect.
    sorted: bool,
}

impl IdTable {
    fn push(&mut self, id: &str) {
        if self.count == 0 {
            self.width = Some(id.len());
            self.sorted = true;
        } else {
            if self.sorted && self.get(self.count - 1) >= id {
                self.sorted = false;
            }
            if self.width.is_some_and(|w| w != id.len()) {
                let w = self.width.take().unwrap_or_default();
                self.ends = (1..=self.count).map(|i| i * w).collect();
            }
        }
        self.text.push_str(id);
        if self.width.is_none() {
            self.ends.push(self.text.len());
        }
        self.count += 1;
    }

    fn finish(&mut self) {
        self.text.shrink_to_fit();
        self.ends.shrink_to_fit();
    }

    fn get(&self, row: usize) -> &str {
        assert!(row < self.count, "row {row} of {} ids", self.count);
        match self.width {
            Some(w) => &self.text[row * w..(row + 1) * w],
            None => {
                let start = if row == 0 { 0 } else { self.ends[row - 1] };
                &self.text[start..self.ends[row]]
            }
        }
    }

    fn find(&self, id: &str) -> Option<usize> {
        if self.sorted {
            let (mut lo, mut hi) = (0, self.count);
            while lo < hi {
                let mid = (lo + hi) / 2;
                match self.get(mid).cmp(id) {
                    Ordering::Less => lo = mid + 1,
                    Ordering::Greater => hi = mid,
                    Ordering::Equal => return Some(mid),
                }
            }
            None
        } else {
            (0..self.count).find(|&row| self.get(row) == id)
        }
    }

    fn memory_bytes(&self) -> usize {
        self.text.capacity() + self.ends.capacity() * std::mem::size_of::<usize>()
    }
}
