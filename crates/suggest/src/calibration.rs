//! Turning ranking scores into probabilities people can read ("0.8" = right about
//! 80 % of the time).

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
/// the step function would tie keep their order; below the whole percent a person is
/// shown. Smaller nudges vanished in f32 rounding near p = 0.5 when blended scores of
/// neighbouring tags differ by less than 1e-2.
const TIE_BREAK: f32 = 1e-3;

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
        assert!((cal.probability(0.25) - 1.0 / 3.0).abs() <= TIE_BREAK * 0.25 + 1e-6);
    }

    #[test]
    fn equal_scores_get_one_probability_and_degenerate_data_gives_none() {
        let cal = Calibration::fit(&[0.5, 0.5, 0.5, 0.9], &[true, false, false, true]).unwrap();
        assert!((cal.interpolate(0.5) - 1.0 / 3.0).abs() < 1e-6);
        assert!((cal.interpolate(0.9) - 1.0).abs() < 1e-6);
        assert!(Calibration::fit(&[0.1, 0.2], &[false, false]).is_none());
        assert!(Calibration::fit(&[], &[]).is_none());
    }
}
