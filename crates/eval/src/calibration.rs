//! Turning ranking scores into probabilities people can read ("0.8" = right about
//! 80 % of the time), and the reliability table that shows whether they are.

use serde::{Deserialize, Serialize};

/// A monotone map from raw scores to probabilities, fitted by isotonic regression
/// (pool adjacent violators) on validation (score, was-it-right) pairs.
///
/// Each pooled block keeps its lowest and highest score; between those points the
/// map is linear, beyond them it is clipped. Linear pieces keep most of the ranking
/// that flat steps would tie away.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    /// Increasing scores.
    xs: Vec<f32>,
    /// Non-decreasing probabilities at `xs`.
    ys: Vec<f32>,
}

/// Calibrated probabilities are nudged by this much of the raw score, so that scores
/// the step function would tie keep their order; far below any reported precision.
const TIE_BREAK: f32 = 1e-6;

impl Calibration {
    /// `None` without pairs or without both outcomes (nothing to calibrate against).
    pub fn fit(scores: &[f32], correct: &[bool]) -> Option<Calibration> {
        let mut pairs: Vec<(f32, f64)> = scores
            .iter()
            .zip(correct)
            .filter(|(s, _)| s.is_finite())
            .map(|(&s, &c)| (s, f64::from(u8::from(c))))
            .collect();
        let positives = pairs.iter().filter(|p| p.1 > 0.0).count();
        if positives == 0 || positives == pairs.len() {
            return None;
        }
        pairs.sort_by(|a, b| a.0.total_cmp(&b.0));
        // Blocks of (lowest score, highest score, sum of outcomes, weight); equal
        // scores start in one block, as they must get one probability.
        let mut blocks: Vec<(f32, f32, f64, f64)> = Vec::new();
        for (s, y) in pairs {
            match blocks.last_mut() {
                Some(last) if last.1 == s => {
                    last.2 += y;
                    last.3 += 1.0;
                }
                _ => blocks.push((s, s, y, 1.0)),
            }
            while blocks.len() > 1 {
                let b = blocks[blocks.len() - 1];
                let a = blocks[blocks.len() - 2];
                if a.2 / a.3 <= b.2 / b.3 {
                    break;
                }
                blocks.pop();
                let merged = blocks.last_mut().unwrap_or_else(|| unreachable!());
                *merged = (a.0, b.1, a.2 + b.2, a.3 + b.3);
            }
        }
        let mut xs = Vec::with_capacity(blocks.len() * 2);
        let mut ys = Vec::with_capacity(blocks.len() * 2);
        for (lo, hi, sum, weight) in blocks {
            let p = (sum / weight) as f32;
            xs.push(lo);
            ys.push(p);
            if hi > lo {
                xs.push(hi);
                ys.push(p);
            }
        }
        Some(Calibration { xs, ys })
    }

    /// Probability for one raw score.
    pub fn probability(&self, score: f32) -> f32 {
        let p = self.interpolate(score);
        (p + TIE_BREAK * score.clamp(-1.0, 1.0)).clamp(0.0, 1.0)
    }

    fn interpolate(&self, x: f32) -> f32 {
        let (Some(&first), Some(&last)) = (self.xs.first(), self.xs.last()) else {
            return 0.0;
        };
        if x <= first {
            return self.ys[0];
        }
        if x >= last {
            return self.ys[self.ys.len() - 1];
        }
        let i = self.xs.partition_point(|&v| v <= x);
        let (x0, x1, y0, y1) = (self.xs[i - 1], self.xs[i], self.ys[i - 1], self.ys[i]);
        y0 + (y1 - y0) * (x - x0) / (x1 - x0)
    }
}

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

    // source: scikit-learn 1.9.1 IsotonicRegression(out_of_bounds="clip") fitted on
    // these ten points predicts [0, 1/6, 7/18, 7/12, 2/3, 1] at
    // [0, 0.15, 0.4, 0.65, 0.85, 1] (run by hand, 2026-12-02).
    #[test]
    fn isotonic_fit_matches_scikit_learn() {
        let x = [0.1f32, 0.2, 0.3, 0.35, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95];
        let y = [
            false, true, false, false, true, false, true, true, false, true,
        ];
        let cal = Calibration::fit(&x, &y).unwrap();
        let want = [0.0f32, 1.0 / 6.0, 7.0 / 18.0, 7.0 / 12.0, 2.0 / 3.0, 1.0];
        for (q, w) in [0.0f32, 0.15, 0.4, 0.65, 0.85, 1.0].iter().zip(want) {
            let got = cal.interpolate(*q);
            assert!((got - w).abs() < 1e-6, "at {q}: {got} vs {w}");
        }
        // the tie-break keeps order without moving a probability visibly
        assert!(cal.probability(0.25) < cal.probability(0.3));
        assert!((cal.probability(0.25) - 1.0 / 3.0).abs() < 1e-5);
    }

    #[test]
    fn equal_scores_get_one_probability_and_degenerate_data_gives_none() {
        let cal = Calibration::fit(&[0.5, 0.5, 0.5, 0.9], &[true, false, false, true]).unwrap();
        assert!((cal.interpolate(0.5) - 1.0 / 3.0).abs() < 1e-6);
        assert!((cal.interpolate(0.9) - 1.0).abs() < 1e-6);
        assert!(Calibration::fit(&[0.1, 0.2], &[false, false]).is_none());
        assert!(Calibration::fit(&[], &[]).is_none());
    }

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
