//! Per-dimension feature scaling, learned from training pictures only.

use ndarray::{Array1, Array2, ArrayView2, Axis};

/// Per-dimension standardisation learned from train rows only, so test
/// pictures never influence the features the methods see. Kept with a trained
/// model, so new pictures are scaled exactly as its training pictures were.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Standardiser {
    mean: Array1<f32>,
    scale: Array1<f32>,
}

/// A dimension's scale never drops below this fraction of the mean standard
/// deviation: a dimension (nearly) constant on train would otherwise blow up
/// tiny test deviations into huge values.
const STD_FLOOR_RELATIVE: f64 = 0.01;

impl Standardiser {
    /// Mean and population standard deviation per column (computed in f64).
    pub fn fit(rows: ArrayView2<f32>) -> Self {
        let n = rows.nrows().max(1) as f64;
        let cols = rows.ncols();
        let mut mean = vec![0.0f64; cols];
        for row in rows.outer_iter() {
            for (m, &v) in mean.iter_mut().zip(row) {
                *m += f64::from(v);
            }
        }
        mean.iter_mut().for_each(|m| *m /= n);
        let mut var = vec![0.0f64; cols];
        for row in rows.outer_iter() {
            for ((s, &v), m) in var.iter_mut().zip(row).zip(&mean) {
                *s += (f64::from(v) - m).powi(2);
            }
        }
        let std: Vec<f64> = var.iter().map(|s| (s / n).sqrt()).collect();
        let mean_std = std.iter().sum::<f64>() / cols.max(1) as f64;
        let floor = if mean_std > 0.0 {
            STD_FLOOR_RELATIVE * mean_std
        } else {
            1.0
        };
        Standardiser {
            mean: mean.iter().map(|&m| m as f32).collect(),
            scale: std.iter().map(|&s| s.max(floor) as f32).collect(),
        }
    }

    /// Number of feature columns it was fitted on.
    pub fn width(&self) -> usize {
        self.mean.len()
    }

    /// `(x - mean) / scale`, column by column.
    pub fn apply(&self, rows: ArrayView2<f32>) -> Array2<f32> {
        let mut out = rows.to_owned();
        out -= &self.mean.view().insert_axis(Axis(0));
        out /= &self.scale.view().insert_axis(Axis(0));
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn standardiser_uses_train_statistics_and_floors_constant_dims() {
        let train = array![[1.0f32, 5.0, 0.0], [3.0, 5.0, 10.0]];
        let s = Standardiser::fit(train.view());
        let z = s.apply(train.view());
        assert_eq!(z, array![[-1.0f32, 0.0, -1.0], [1.0, 0.0, 1.0]]);
        // constant column: scale floored at 1% of mean std (mean std = (1+0+5)/3 = 2)
        let t = s.apply(array![[2.0f32, 5.02, 5.0]].view());
        assert!((t[[0, 1]] - 1.0).abs() < 1e-3, "{t}");
        assert_eq!(s.width(), 3);
    }
}
