//! The reliability table: stated probability against how often suggestions were right.

use serde::{Deserialize, Serialize};

/// One row of a reliability table: suggestions whose probability fell in
/// `[lower, upper)` (the last bin includes 1).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReliabilityBin {
    pub lower: f32,
    pub upper: f32,
    pub count: usize,
    /// Mean stated probability in the bin (`None` when empty).
    pub mean_probability: Option<f64>,
    /// Share of the bin's suggestions that were right (`None` when empty).
    pub observed: Option<f64>,
}

/// Stated probability against observed frequency, in equal-width bins.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reliability {
    pub bins: Vec<ReliabilityBin>,
    /// Expected calibration error: Σ (count/total) · |observed − mean probability|.
    pub expected_error: f64,
    pub pairs: usize,
}

impl Reliability {
    pub fn measure(probabilities: &[f32], correct: &[bool], n_bins: usize) -> Reliability {
        let n_bins = n_bins.max(1);
        let mut sums = vec![(0usize, 0.0f64, 0usize); n_bins];
        for (&p, &c) in probabilities.iter().zip(correct) {
            let bin = ((p.clamp(0.0, 1.0) * n_bins as f32) as usize).min(n_bins - 1);
            sums[bin].0 += 1;
            sums[bin].1 += f64::from(p);
            sums[bin].2 += usize::from(c);
        }
        let pairs: usize = sums.iter().map(|s| s.0).sum();
        let mut expected_error = 0.0;
        let bins = sums
            .iter()
            .enumerate()
            .map(|(i, &(count, sum_p, right))| {
                let (mean_probability, observed) = if count > 0 {
                    let m = sum_p / count as f64;
                    let o = right as f64 / count as f64;
                    expected_error += count as f64 / pairs as f64 * (o - m).abs();
                    (Some(m), Some(o))
                } else {
                    (None, None)
                };
                ReliabilityBin {
                    lower: i as f32 / n_bins as f32,
                    upper: (i + 1) as f32 / n_bins as f32,
                    count,
                    mean_probability,
                    observed,
                }
            })
            .collect();
        Reliability {
            bins,
            expected_error,
            pairs,
        }
    }

    /// A plain-text table, one line per non-empty bin.
    pub fn to_table(&self) -> String {
        let mut out = String::from("probability   suggestions  stated  observed\n");
        for b in self.bins.iter().filter(|b| b.count > 0) {
            out.push_str(&format!(
                "{:.1}–{:.1}      {:>11}  {:>6.3}  {:>8.3}\n",
                b.lower,
                b.upper,
                b.count,
                b.mean_probability.unwrap_or(0.0),
                b.observed.unwrap_or(0.0)
            ));
        }
        out.push_str(&format!(
            "expected calibration error {:.3} over {} (picture, tag) pairs\n",
            self.expected_error, self.pairs
        ));
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // source: scikit-learn 1.9.1 sklearn.calibration.calibration_curve(n_bins=5,
    // strategy="uniform") on these pairs: prob_true [0, 1, .5, 1, .6667], prob_pred
    // [.10667, .25, .5, .65, .90667] (run by hand, 2026-12-02).
    #[test]
    fn reliability_bins_match_scikit_learn() {
        let p = [
            0.05f32, 0.15, 0.25, 0.45, 0.55, 0.65, 0.85, 0.95, 0.92, 0.12,
        ];
        let t = [
            false, false, true, false, true, true, true, true, false, false,
        ];
        let r = Reliability::measure(&p, &t, 5);
        let filled: Vec<&ReliabilityBin> = r.bins.iter().filter(|b| b.count > 0).collect();
        let want_true = [0.0, 1.0, 0.5, 1.0, 2.0 / 3.0];
        let want_pred = [0.106_666_67, 0.25, 0.5, 0.65, 0.906_666_67];
        for ((b, t), p) in filled.iter().zip(want_true).zip(want_pred) {
            assert!((b.observed.unwrap() - t).abs() < 1e-6, "{b:?}");
            assert!((b.mean_probability.unwrap() - p).abs() < 1e-6, "{b:?}");
        }
        // by hand: ECE = (3·.10667 + 1·.75 + 2·0 + 1·.35 + 3·.24) / 10 = 0.214
        assert!(
            (r.expected_error - 0.214).abs() < 1e-6,
            "{}",
            r.expected_error
        );
        assert!(r.to_table().contains("expected calibration error 0.214"));
    }
}
