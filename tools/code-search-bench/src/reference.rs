//! The yardstick for recall: cosine over the f32 codes, outside the index, so its u8 rounding shows.

use rayon::prelude::*;

/// The bench's own float brute force: cosine over the f32 codes, best `k` rows (ties by row).
pub(crate) fn float_top_k(
    codes: &[f32],
    norms: &[f32],
    dim: usize,
    query: &[f32],
    k: usize,
) -> Vec<usize> {
    let qn = query.iter().map(|v| v * v).sum::<f32>().sqrt();
    const ROWS: usize = 8192;
    let mut best: Vec<(f32, usize)> = codes
        .par_chunks(ROWS * dim)
        .enumerate()
        .flat_map_iter(|(chunk, rows)| {
            let mut local: Vec<(f32, usize)> = rows
                .chunks_exact(dim)
                .enumerate()
                .map(|(i, row)| {
                    let r = chunk * ROWS + i;
                    let denom = qn * norms[r];
                    let s = if denom > 0.0 {
                        dot8(row, query) / denom
                    } else {
                        0.0
                    };
                    (s, r)
                })
                .collect();
            let keep = k.min(local.len());
            if keep > 0 && local.len() > keep {
                local.select_nth_unstable_by(keep - 1, by_score);
            }
            local.truncate(keep);
            local
        })
        .collect();
    best.sort_by(by_score);
    best.truncate(k);
    best.into_iter().map(|(_, r)| r).collect()
}

fn by_score(a: &(f32, usize), b: &(f32, usize)) -> std::cmp::Ordering {
    b.0.total_cmp(&a.0).then(a.1.cmp(&b.1))
}

/// Dot product with eight running sums so the compiler can vectorise it.
pub(crate) fn dot8(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0f32; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn float_reference_finds_the_plain_best_rows() {
        let codes = [1.0, 0.0, 0.0, 1.0, 0.7, 0.7];
        let norms: Vec<f32> = codes
            .chunks(2)
            .map(|c| c.iter().map(|v| v * v).sum::<f32>().sqrt())
            .collect();
        // source: by hand: cos to (1, 0.1) is 0.995, 0.0995 and 0.7740 for the three rows.
        assert_eq!(float_top_k(&codes, &norms, 2, &[1.0, 0.1], 2), vec![0, 2]);
    }
}
