//! First-order optimisers for gradient training of the unrolled networks.

use ndarray::{ArrayD, ArrayViewMutD, Zip};

/// Adam (Kingma & Ba 2015) with β1 = 0.9, β2 = 0.999, ε = 1e-8.
pub(crate) struct Adam {
    first: Vec<ArrayD<f32>>,
    second: Vec<ArrayD<f32>>,
    steps: i32,
}

impl Adam {
    /// Zero moments shaped like `params`.
    pub(crate) fn new<const N: usize>(params: [ArrayViewMutD<f32>; N]) -> Self {
        let zeros: Vec<ArrayD<f32>> = params.iter().map(|p| ArrayD::zeros(p.raw_dim())).collect();
        Self {
            first: zeros.clone(),
            second: zeros,
            steps: 0,
        }
    }

    /// One update of every parameter block from its gradient, in the order of `params`.
    pub(crate) fn step<const N: usize>(
        &mut self,
        params: [ArrayViewMutD<f32>; N],
        grads: &[ArrayD<f32>],
        lr: f32,
    ) {
        const B1: f32 = 0.9;
        const B2: f32 = 0.999;
        self.steps += 1;
        let c1 = 1.0 - B1.powi(self.steps);
        let c2 = 1.0 - B2.powi(self.steps);
        for (((mut p, g), m), v) in params
            .into_iter()
            .zip(grads)
            .zip(&mut self.first)
            .zip(&mut self.second)
        {
            Zip::from(&mut p)
                .and(g)
                .and(m)
                .and(v)
                .for_each(|p, &g, m, v| {
                    *m = B1 * *m + (1.0 - B1) * g;
                    *v = B2 * *v + (1.0 - B2) * g * g;
                    *p -= lr * (*m / c1) / ((*v / c2).sqrt() + 1e-8);
                });
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{array, Array1};

    // source: Kingma & Ba 2015, "Adam: A Method for Stochastic Optimization", Algorithm 1.
    // By hand: after one step the bias-corrected moments are m̂ = g and v̂ = g², so each
    // parameter moves by −lr·g/(|g| + ε) ≈ −lr·sign(g); a zero gradient leaves it in place.
    // Second step with the same g: m̂ = g and v̂ = g² again, so the move repeats.
    #[test]
    fn first_steps_move_by_the_learning_rate_against_the_gradient() {
        let mut p: Array1<f32> = array![1.0, -2.0, 0.5];
        let g = array![4.0f32, -0.01, 0.0].into_dyn();
        let mut adam = Adam::new([p.view_mut().into_dyn()]);
        adam.step([p.view_mut().into_dyn()], std::slice::from_ref(&g), 0.1);
        let want = [0.9, -1.9, 0.5];
        for (got, want) in p.iter().zip(want) {
            assert!((got - want).abs() < 1e-5, "{p}");
        }
        adam.step([p.view_mut().into_dyn()], std::slice::from_ref(&g), 0.1);
        let want = [0.8, -1.8, 0.5];
        for (got, want) in p.iter().zip(want) {
            assert!((got - want).abs() < 1e-5, "{p}");
        }
    }
}
