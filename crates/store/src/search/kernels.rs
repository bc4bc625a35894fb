//! The two inner loops of code search, with the CPU instructions chosen at run time.
//!
//! Why run time: the default x86-64 target has neither `popcnt` nor AVX2, and the project
//! does not pin a target CPU, so a plain build would count bits 2.8× slower. Every path
//! computes exactly the same integers, so results never depend on the CPU.

/// Dot product of every `dim`-byte row in `rows` with `query`, one result per row in `out`.
///
/// The caller guarantees `255 · Σ|query| < 2³¹`, so no partial sum can overflow.
pub(super) fn dots(rows: &[u8], dim: usize, query: &[i16], out: &mut [i32]) {
    debug_assert_eq!(query.len(), dim);
    debug_assert_eq!(rows.len(), dim * out.len());
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU supports AVX2, checked just above.
            unsafe { dots_avx2(rows, dim, query, out) };
            return;
        }
    }
    dots_portable(rows, dim, query, out);
}

/// Plain loop; the compiler vectorises it with whatever the target offers.
pub(super) fn dots_portable(rows: &[u8], dim: usize, query: &[i16], out: &mut [i32]) {
    for (row, slot) in rows.chunks_exact(dim).zip(out.iter_mut()) {
        *slot = row
            .iter()
            .zip(query)
            .map(|(&r, &q)| i32::from(r) * i32::from(q))
            .sum();
    }
}

/// AVX2: widen 16 bytes to i16 and multiply-add pairs into eight i32 lanes.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn dots_avx2(rows: &[u8], dim: usize, query: &[i16], out: &mut [i32]) {
    use std::arch::x86_64::*;
    let blocks = dim / 16;
    let q = query.as_ptr();
    for (row, slot) in rows.chunks_exact(dim).zip(out.iter_mut()) {
        let r = row.as_ptr();
        let mut acc0 = _mm256_setzero_si256();
        let mut acc1 = _mm256_setzero_si256();
        let mut b = 0;
        // SAFETY (all loads): block b covers bytes/values [16b, 16b + 16) with b < dim / 16,
        // inside `row` (dim bytes) and `query` (dim values); unaligned loads are used.
        while b + 2 <= blocks {
            let r0 = _mm256_cvtepu8_epi16(unsafe { _mm_loadu_si128(r.add(b * 16).cast()) });
            let q0 = unsafe { _mm256_loadu_si256(q.add(b * 16).cast()) };
            acc0 = _mm256_add_epi32(acc0, _mm256_madd_epi16(r0, q0));
            let r1 = _mm256_cvtepu8_epi16(unsafe { _mm_loadu_si128(r.add(b * 16 + 16).cast()) });
            let q1 = unsafe { _mm256_loadu_si256(q.add(b * 16 + 16).cast()) };
            acc1 = _mm256_add_epi32(acc1, _mm256_madd_epi16(r1, q1));
            b += 2;
        }
        if b < blocks {
            let r0 = _mm256_cvtepu8_epi16(unsafe { _mm_loadu_si128(r.add(b * 16).cast()) });
            let q0 = unsafe { _mm256_loadu_si256(q.add(b * 16).cast()) };
            acc0 = _mm256_add_epi32(acc0, _mm256_madd_epi16(r0, q0));
        }
        let acc = _mm256_add_epi32(acc0, acc1);
        let s = _mm_add_epi32(
            _mm256_castsi256_si128(acc),
            _mm256_extracti128_si256::<1>(acc),
        );
        let s = _mm_add_epi32(s, _mm_shuffle_epi32::<0b01_00_11_10>(s));
        let s = _mm_add_epi32(s, _mm_shuffle_epi32::<0b10_11_00_01>(s));
        let mut total = _mm_cvtsi128_si32(s);
        for j in blocks * 16..dim {
            total += i32::from(row[j]) * i32::from(query[j]);
        }
        *slot = total;
    }
}

/// Hamming distance of every `words`-word hash in `hashes` to `query`, one per row in `out`.
pub(super) fn hamming(hashes: &[u64], words: usize, query: &[u64], out: &mut [u16]) {
    debug_assert_eq!(query.len(), words);
    debug_assert_eq!(hashes.len(), words * out.len());
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("popcnt") {
            // SAFETY: the CPU supports popcnt, checked just above.
            unsafe { hamming_popcnt(hashes, words, query, out) };
            return;
        }
    }
    hamming_portable(hashes, words, query, out);
}

/// Same loop compiled with the popcnt instruction enabled.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "popcnt")]
unsafe fn hamming_popcnt(hashes: &[u64], words: usize, query: &[u64], out: &mut [u16]) {
    hamming_body(hashes, words, query, out);
}

pub(super) fn hamming_portable(hashes: &[u64], words: usize, query: &[u64], out: &mut [u16]) {
    hamming_body(hashes, words, query, out);
}

/// Fixed widths up to 256 bits get fully unrolled loops; wider hashes take the general one.
#[inline(always)]
fn hamming_body(hashes: &[u64], words: usize, query: &[u64], out: &mut [u16]) {
    match words {
        1 => hamming_fixed::<1>(hashes, query, out),
        2 => hamming_fixed::<2>(hashes, query, out),
        3 => hamming_fixed::<3>(hashes, query, out),
        4 => hamming_fixed::<4>(hashes, query, out),
        _ => {
            for (row, slot) in hashes.chunks_exact(words).zip(out.iter_mut()) {
                let d: u32 = row
                    .iter()
                    .zip(query)
                    .map(|(a, b)| (a ^ b).count_ones())
                    .sum();
                *slot = d as u16;
            }
        }
    }
}

#[inline(always)]
fn hamming_fixed<const W: usize>(hashes: &[u64], query: &[u64], out: &mut [u16]) {
    let mut q = [0u64; W];
    q.copy_from_slice(&query[..W]);
    for (row, slot) in hashes.chunks_exact(W).zip(out.iter_mut()) {
        let mut d = 0u32;
        for w in 0..W {
            d += (row[w] ^ q[w]).count_ones();
        }
        *slot = d as u16;
    }
}

/// Asks the CPU to start loading `data` into cache; a hint with no effect on results.
#[inline(always)]
pub(super) fn prefetch<T>(data: &[T]) {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
        let bytes = std::mem::size_of_val(data);
        let start = data.as_ptr().cast::<i8>();
        let mut offset = 0;
        // Every 64-byte line the slice touches, including a last partial one.
        while offset < bytes {
            // SAFETY: prefetch never faults and reads nothing architecturally; the address
            // stays inside `data`. SSE (which provides it) is part of x86-64.
            unsafe { _mm_prefetch::<_MM_HINT_T0>(start.add(offset)) };
            offset += 64;
        }
        if bytes > 0 {
            // SAFETY: as above; `bytes - 1` is the slice's last byte.
            unsafe { _mm_prefetch::<_MM_HINT_T0>(start.add(bytes - 1)) };
        }
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = data;
}
