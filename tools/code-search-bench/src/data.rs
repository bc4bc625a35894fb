//! The synthetic codes in the rows the bench asks for, and how hard they make the search.

use rayon::prelude::*;
use serde_json::json;

use crate::reference::{dot8, float_top_k};
use crate::stats::mean;
use crate::synth;

/// Codes of the given point numbers, row-major.
pub(crate) fn generate(mix: &synth::Mixture, points: &[usize]) -> Vec<f32> {
    let dim = mix.dim;
    let mut out = vec![0f32; points.len() * dim];
    out.par_chunks_mut(dim)
        .zip(points.par_iter())
        .for_each(|(row, &p)| mix.point(p as u64, row));
    out
}

pub(crate) fn medians(codes: &[f32], dim: usize) -> Vec<f32> {
    (0..dim)
        .into_par_iter()
        .map(|j| {
            let mut column: Vec<f32> = codes.chunks(dim).map(|c| c[j]).collect();
            column.sort_by(f32::total_cmp);
            column[column.len() / 2]
        })
        .collect()
}

pub(crate) fn norms_of(rows: &[Vec<f32>]) -> Vec<f32> {
    rows.iter()
        .map(|r| r.iter().map(|v| v * v).sum::<f32>().sqrt())
        .collect()
}

/// How hard the data is: saturation of the units, and how much nearer a query's
/// neighbours are than an arbitrary code.
pub(crate) fn describe(
    codes: &[f32],
    norms: &[f32],
    dim: usize,
    queries: &[Vec<f32>],
    query_norms: &[f32],
    k: usize,
) -> serde_json::Value {
    let saturated = codes
        .par_iter()
        .filter(|&&v| !(0.05..=0.95).contains(&v))
        .count();
    let n = norms.len();
    let cos = |q: usize, r: usize| {
        let d = query_norms[q] * norms[r];
        if d > 0.0 {
            dot8(&codes[r * dim..(r + 1) * dim], &queries[q]) / d
        } else {
            0.0
        }
    };
    let mut nn1 = Vec::new();
    let mut nnk = Vec::new();
    let mut random = Vec::new();
    for (q, query) in queries.iter().enumerate().take(50) {
        let top = float_top_k(codes, norms, dim, query, k);
        if let (Some(&a), Some(&b)) = (top.first(), top.last()) {
            nn1.push(f64::from(cos(q, a)));
            nnk.push(f64::from(cos(q, b)));
        }
        for j in 0..20 {
            random.push(f64::from(cos(q, (q * 7_919 + j * 104_729) % n)));
        }
    }
    json!({
        "saturated_fraction": saturated as f64 / codes.len() as f64,
        "nn1_cosine": mean(&nn1),
        "nnk_cosine": mean(&nnk),
        "random_cosine": mean(&random),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn synthetic_codes_are_probabilities_and_repeatable() {
        let shape = synth::Shape {
            clusters: 4,
            latent: 3,
            dim: 20,
            spread: 0.6,
            decay: 0.9,
            unit_noise: 0.25,
            gain: 2.0,
        };
        let (a, b) = (
            synth::Mixture::new(1, &shape),
            synth::Mixture::new(1, &shape),
        );
        let (mut x, mut y) = (vec![0f32; 20], vec![0f32; 20]);
        a.point(12, &mut x);
        b.point(12, &mut y);
        assert_eq!(x, y);
        assert!(x.iter().all(|v| (0.0..=1.0).contains(v)));
        b.point(13, &mut y);
        assert_ne!(x, y);
        assert_eq!(generate(&a, &[12]), x);
    }
}
