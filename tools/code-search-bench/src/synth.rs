//! Synthetic codes shaped like learned ones: sigmoid probabilities of a linear map from a
//! low-dimensional latent space, where pictures form clusters of very different sizes and
//! vary along a few directions more than others. Units are correlated (they share the
//! latent factors), many sit near 0 or 1, and near neighbours exist, as in a trained model.
//!
//! Every point is a pure function of (seed, index), so any range can be regenerated
//! without keeping a million codes around.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

pub struct Mixture {
    seed: u64,
    latent: usize,
    pub dim: usize,
    /// clusters × latent.
    centres: Vec<f64>,
    /// clusters × latent: per-cluster spread along each latent axis (decaying).
    scales: Vec<f64>,
    /// Cumulative cluster probabilities (Zipf-like sizes).
    cumulative: Vec<f64>,
    /// dim × latent.
    projection: Vec<f64>,
    bias: Vec<f64>,
    unit_noise: f64,
}

pub struct Shape {
    pub clusters: usize,
    pub latent: usize,
    pub dim: usize,
    /// Largest within-cluster standard deviation along a latent axis (centres are N(0, 1)).
    pub spread: f64,
    /// Per-axis decay of the spread, so clusters are elongated along a few directions.
    pub decay: f64,
    /// Independent noise added to each unit before the sigmoid.
    pub unit_noise: f64,
    /// Scale of the latent → unit map (larger → more units saturated near 0 or 1).
    pub gain: f64,
}

fn gaussian(rng: &mut ChaCha8Rng) -> f64 {
    // Box–Muller; one value per call keeps the stream simple.
    let u: f64 = 1.0 - rng.random::<f64>();
    let v: f64 = rng.random::<f64>();
    (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
}

impl Mixture {
    pub fn new(seed: u64, shape: &Shape) -> Mixture {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let (k, l, d) = (shape.clusters.max(1), shape.latent.max(1), shape.dim);
        let centres = (0..k * l).map(|_| gaussian(&mut rng)).collect();
        let scales = (0..k)
            .flat_map(|_| {
                let s = shape.spread * (0.6 + 0.8 * rng.random::<f64>());
                (0..l).map(move |a| s * shape.decay.powi(a as i32))
            })
            .collect();
        let weights: Vec<f64> = (0..k).map(|c| 1.0 / (c as f64 + 1.0).powf(0.8)).collect();
        let total: f64 = weights.iter().sum();
        let mut acc = 0.0;
        let cumulative = weights
            .iter()
            .map(|w| {
                acc += w / total;
                acc
            })
            .collect();
        let projection = (0..d * l)
            .map(|_| gaussian(&mut rng) * shape.gain / (l as f64).sqrt())
            .collect();
        let bias = (0..d).map(|_| 0.7 * gaussian(&mut rng)).collect();
        Mixture {
            seed,
            latent: l,
            dim: d,
            centres,
            scales,
            cumulative,
            projection,
            bias,
            unit_noise: shape.unit_noise,
        }
    }

    pub fn clusters(&self) -> usize {
        self.cumulative.len()
    }

    /// Point number `index` (the index's codes use 0..n, held-out queries n..).
    pub fn point(&self, index: u64, out: &mut [f32]) {
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed ^ 0x5eed_c0de);
        rng.set_stream(index);
        let u: f64 = rng.random();
        let c = self
            .cumulative
            .partition_point(|&p| p < u)
            .min(self.clusters() - 1);
        let l = self.latent;
        let z: Vec<f64> = (0..l)
            .map(|a| self.centres[c * l + a] + self.scales[c * l + a] * gaussian(&mut rng))
            .collect();
        for (j, o) in out.iter_mut().enumerate() {
            let noise = self.unit_noise * gaussian(&mut rng);
            *o = self.unit(j, &z, noise);
        }
    }

    /// The code of a cluster centre: what a tag's code looks like (no picture noise).
    pub fn centre(&self, cluster: usize, out: &mut [f32]) {
        let l = self.latent;
        let z = &self.centres[cluster * l..(cluster + 1) * l];
        for (j, o) in out.iter_mut().enumerate() {
            *o = self.unit(j, z, 0.0);
        }
    }

    fn unit(&self, j: usize, z: &[f64], noise: f64) -> f32 {
        let row = &self.projection[j * self.latent..(j + 1) * self.latent];
        let x: f64 = self.bias[j] + noise + row.iter().zip(z).map(|(w, v)| w * v).sum::<f64>();
        (1.0 / (1.0 + (-x).exp())) as f32
    }
}
