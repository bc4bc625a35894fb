//! Row passes over fixed chunks of [`SAMPLE_CHUNK_ROWS`] rows, on rayon threads when the
//! matrix is large enough. Each chunk that draws random numbers has its own generator,
//! seeded in chunk order, so results do not depend on the number of threads.

use ndarray::Array2;
use rand::{RngCore, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;

use crate::kernels::bernoulli_from;

/// Rows per independently seeded sampling chunk. Fixed (not derived from the thread
/// count) so that the same seed gives the same samples on any machine.
pub const SAMPLE_CHUNK_ROWS: usize = 32;

/// Below this many elements a row pass (sigmoids, draws) runs on the calling thread:
/// waking another thread costs more than it saves (measured: BENCHMARKS.md, section "How
/// fast is training?").
pub(crate) const PAR_MIN_ELEMENTS: usize = 1 << 15;

/// `dst ← draws with probabilities src` for row-major matrices of `cols` columns, seeded
/// per row chunk exactly like [`for_each_row_seeded`] with
/// [`bernoulli_in_place`](crate::kernels::bernoulli_in_place) on a copy of `src`, without
/// the copy.
pub(crate) fn bernoulli_rows_from(
    src: &[f32],
    dst: &mut [f32],
    cols: usize,
    rng: &mut impl RngCore,
) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let seeds: Vec<u64> = dst.chunks(chunk).map(|_| rng.next_u64()).collect();
    let run = |((p, out), &seed): ((&[f32], &mut [f32]), &u64)| {
        let mut r = ChaCha8Rng::seed_from_u64(seed);
        for (p, out) in p.chunks_exact(cols).zip(out.chunks_exact_mut(cols)) {
            bernoulli_from(p, out, &mut r);
        }
    };
    if dst.len() >= PAR_MIN_ELEMENTS {
        src.par_chunks(chunk)
            .zip(dst.par_chunks_mut(chunk))
            .zip(seeds.par_iter())
            .for_each(run);
    } else {
        src.chunks(chunk)
            .zip(dst.chunks_mut(chunk))
            .zip(seeds.iter())
            .for_each(run);
    }
}

/// Applies `f(row index, row)` to every row of a standard-layout matrix, over chunks of
/// [`SAMPLE_CHUNK_ROWS`] rows, on rayon threads when the matrix is large enough.
pub(crate) fn for_each_row(x: &mut Array2<f32>, f: impl Fn(usize, &mut [f32]) + Sync) {
    let cols = x.ncols();
    let flat = x
        .as_slice_mut()
        .expect("owned matrices are in standard layout");
    rows_apply(flat, cols, |first, block| {
        for (i, row) in block.chunks_exact_mut(cols).enumerate() {
            f(first + i, row);
        }
    });
}

/// Like [`for_each_row`] on a flat row-major buffer of `cols` columns, with one generator
/// per chunk, seeded from `rng` in chunk order: the draws do not depend on the thread count.
pub(crate) fn for_each_row_seeded(
    flat: &mut [f32],
    cols: usize,
    rng: &mut impl RngCore,
    f: impl Fn(usize, &mut [f32], &mut ChaCha8Rng) + Sync,
) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let seeds: Vec<u64> = flat.chunks(chunk).map(|_| rng.next_u64()).collect();
    rows_apply(flat, cols, |first, block| {
        let mut r = ChaCha8Rng::seed_from_u64(seeds[first / SAMPLE_CHUNK_ROWS]);
        for (i, row) in block.chunks_exact_mut(cols).enumerate() {
            f(first + i, row, &mut r);
        }
    });
}

/// Runs `f(first row, block)` over blocks of [`SAMPLE_CHUNK_ROWS`] rows.
pub(crate) fn rows_apply(flat: &mut [f32], cols: usize, f: impl Fn(usize, &mut [f32]) + Sync) {
    let chunk = SAMPLE_CHUNK_ROWS * cols;
    if chunk == 0 {
        return;
    }
    let run = |(k, block): (usize, &mut [f32])| f(k * SAMPLE_CHUNK_ROWS, block);
    if flat.len() >= PAR_MIN_ELEMENTS {
        flat.par_chunks_mut(chunk).enumerate().for_each(run);
    } else {
        flat.chunks_mut(chunk).enumerate().for_each(run);
    }
}
