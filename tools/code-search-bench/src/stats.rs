//! Summaries of the per-query figures.

use std::time::Duration;

pub(crate) fn recall(found: &[usize], truth: &[usize], k: usize) -> f64 {
    let truth = &truth[..k.min(truth.len())];
    if truth.is_empty() {
        return 1.0;
    }
    found.iter().filter(|r| truth.contains(r)).count() as f64 / truth.len() as f64
}

pub(crate) fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len().max(1) as f64
}

/// Nearest-rank percentile.
pub(crate) fn percentile(v: &[f64], p: f64) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let rank = ((p * s.len() as f64).ceil() as usize).clamp(1, s.len().max(1));
    s.get(rank - 1).copied().unwrap_or(f64::NAN)
}

pub(crate) fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recall_and_percentiles_by_hand() {
        // source: by hand: 3 of the 4 true rows found.
        assert_eq!(recall(&[1, 2, 3, 9], &[3, 2, 1, 0], 4), 0.75);
        // source: by hand: nearest-rank percentile of 1..=10 (p50 → 5th, p99 → 10th value).
        let v: Vec<f64> = (1..=10).rev().map(f64::from).collect();
        assert_eq!(percentile(&v, 0.5), 5.0);
        assert_eq!(percentile(&v, 0.99), 10.0);
    }
}
