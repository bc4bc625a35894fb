//! The measured cases: the digits set at scikit-learn's example sizes, then tool-sized
//! shapes and the joint model's picture layer.

use std::hint::black_box;

use anyhow::{Context, Result};
use ndarray::linalg::general_mat_mul;
use ndarray::{s, Array2, ArrayView2, Axis};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use tagweave_model::{
    matmul, train, BinaryRbm, GaussianBernoulliRbm, Rbm, RbmTrainingOptions, VisibleUnits,
};

use crate::{clock_ms, median, Row};

#[derive(Clone, Copy)]
pub enum Units {
    Binary,
    Gaussian,
}

pub struct Case {
    pub name: String,
    units: Units,
    data: Data,
    hidden: usize,
    opts: RbmTrainingOptions,
}

#[derive(Clone, Copy)]
enum Data {
    Digits,
    /// Rows × visible; binary at density 0.2 or standard normal.
    Random {
        rows: usize,
        visible: usize,
    },
}

/// The 1,797 UCI optical digits (8×8, values 0–16), scaled to [0, 1] as scikit-learn's
/// RBM example does.
fn digits() -> Result<Array2<f32>> {
    let text = include_str!("../../../crates/model/testdata/digits.csv");
    let mut values = Vec::new();
    for (n, line) in text.lines().enumerate().skip(1) {
        for x in line.split(',').take(64) {
            let v: f32 = x
                .parse()
                .with_context(|| format!("digits.csv line {}: bad pixel {x:?}", n + 1))?;
            values.push(v / 16.0);
        }
    }
    Ok(Array2::from_shape_vec((values.len() / 64, 64), values)?)
}

fn random_rows(units: Units, rows: usize, visible: usize, seed: u64) -> Array2<f32> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    match units {
        Units::Binary => {
            Array2::from_shape_simple_fn((rows, visible), || f32::from(rng.random::<f32>() < 0.2))
        }
        Units::Gaussian => Array2::from_shape_simple_fn((rows, visible), || {
            // Sum of 12 uniforms − 6: unit variance, close enough to normal for timing.
            (0..12).map(|_| rng.random::<f32>()).sum::<f32>() - 6.0
        }),
    }
}

pub fn all(rows: usize, epochs: usize) -> Vec<Case> {
    let digits_opts = RbmTrainingOptions {
        epochs: 20,
        batch_size: 64,
        learning_rate: 0.05,
        ..RbmTrainingOptions::default()
    };
    // scikit-learn's BernoulliRBM: persistent CD-1, no momentum, no weight decay.
    let like_sklearn = RbmTrainingOptions {
        persistent: true,
        initial_momentum: 0.0,
        final_momentum: 0.0,
        weight_decay: 0.0,
        ..digits_opts.clone()
    };
    let mut cases = vec![
        Case {
            name: "digits".into(),
            units: Units::Binary,
            data: Data::Digits,
            hidden: 256,
            opts: digits_opts,
        },
        Case {
            name: "digits-pcd".into(),
            units: Units::Binary,
            data: Data::Digits,
            hidden: 256,
            opts: like_sklearn,
        },
    ];
    let shaped = |units, name: &str, rows, visible, hidden, batch, lr| Case {
        name: name.into(),
        units,
        data: Data::Random { rows, visible },
        hidden,
        opts: RbmTrainingOptions {
            epochs,
            batch_size: batch,
            learning_rate: lr,
            ..RbmTrainingOptions::default()
        },
    };
    cases.push(shaped(
        Units::Gaussian,
        "tool-gauss",
        rows,
        1024,
        1024,
        256,
        0.001,
    ));
    cases.push(shaped(
        Units::Binary,
        "tool-binary",
        rows,
        1024,
        1024,
        256,
        0.05,
    ));
    for batch in [32, 64, 256] {
        cases.push(shaped(
            Units::Gaussian,
            &format!("joint-b{batch}"),
            rows / 2,
            3700,
            512,
            batch,
            0.001,
        ));
    }
    cases
}

impl Case {
    pub fn run(&self) -> Result<Row> {
        let data = match self.data {
            Data::Digits => digits()?,
            Data::Random { rows, visible } => random_rows(self.units, rows, visible, 1),
        };
        let (n, visible) = data.dim();
        let (epoch_ms, reconstruction_error, weights) = match self.units {
            Units::Binary => {
                let mut rbm = BinaryRbm::new(visible, self.hidden, 0.01, 0);
                let ms = timed_train(&mut rbm, data.view(), &self.opts)?;
                (ms, rbm.reconstruction_error(data.view()), rbm.weights)
            }
            Units::Gaussian => {
                let mut rbm = GaussianBernoulliRbm::new(visible, self.hidden, 0.01, 0);
                let ms = timed_train(&mut rbm, data.view(), &self.opts)?;
                (ms, rbm.reconstruction_error(data.view()), rbm.weights)
            }
        };
        let ms_per_epoch = median(epoch_ms);

        let persistent = self.opts.persistent;
        // Both methods make five products per step: v₀→h₀, h→v (through Wᵀ), v_k→h_k and
        // the two gradient products (PCD starts its h→v from the chains' kept hidden
        // sample, as scikit-learn does). The trainer's sixth, the mean-field
        // reconstruction behind its error report, is not counted.
        let products_per_step = 5;
        // Every product is rows·v·h multiply–adds per epoch, summed over the batches.
        let gflop_per_epoch =
            products_per_step as f64 * 2.0 * (n * visible * self.hidden) as f64 / 1e9;
        let passes = self.opts.epochs.clamp(3, 5);
        let batch = self.opts.batch_size;
        // The trainer keeps a row-major Wᵀ for small models; the plain products take the
        // transposed view.
        let wt_copy = weights.t().as_standard_layout().into_owned();
        let timed = |mul: Mul, wt: ArrayView2<f32>| {
            median(
                (0..passes)
                    .map(|_| gemm_epoch(data.view(), weights.view(), wt, batch, persistent, mul))
                    .collect(),
            )
        };
        let gemm_ms_per_epoch = timed(dot, weights.t());
        let split_ms_per_epoch = timed(split_dot, weights.t());
        let own_ms_per_epoch = timed(own_gemm, wt_copy.view());
        let library_ms_per_epoch = timed(library_gemm, wt_copy.view());
        let library_one_ms_per_epoch = timed(library_gemm_one_thread, wt_copy.view());
        let gflops = gflop_per_epoch / ms_per_epoch * 1e3;
        let gemm_gflops = gflop_per_epoch / gemm_ms_per_epoch * 1e3;
        Ok(Row {
            name: self.name.clone(),
            units: match self.units {
                Units::Binary => "binary",
                Units::Gaussian => "gaussian",
            },
            method: if persistent { "PCD-1" } else { "CD-1" },
            rows: n,
            batch: self.opts.batch_size,
            visible,
            hidden: self.hidden,
            epochs: self.opts.epochs,
            ms_per_epoch,
            products_per_step,
            gflop_per_epoch,
            gflops,
            gemm_ms_per_epoch,
            gemm_gflops,
            ratio: gflops / gemm_gflops,
            split_gemm_gflops: gflop_per_epoch / split_ms_per_epoch * 1e3,
            split_ratio: ms_per_epoch.recip() * split_ms_per_epoch,
            own_gemm_gflops: gflop_per_epoch / own_ms_per_epoch * 1e3,
            own_ratio: ms_per_epoch.recip() * own_ms_per_epoch,
            library_gemm_gflops: gflop_per_epoch / library_ms_per_epoch * 1e3,
            library_one_gemm_gflops: gflop_per_epoch / library_one_ms_per_epoch * 1e3,
            reconstruction_error,
        })
    }
}

/// Trains and returns each epoch's wall time in milliseconds.
fn timed_train<V: VisibleUnits>(
    rbm: &mut Rbm<V>,
    data: ArrayView2<f32>,
    opts: &RbmTrainingOptions,
) -> Result<Vec<f64>> {
    let mut epoch_ms = Vec::new();
    let mut last = clock_ms();
    train(rbm, data, None, opts, &mut |_| {
        let now = clock_ms();
        epoch_ms.push(now - last);
        last = now;
    })?;
    Ok(epoch_ms)
}

type Mul = fn(ArrayView2<f32>, ArrayView2<f32>) -> Array2<f32>;

/// One epoch's worth of a step's five products with `mul`, in milliseconds: v→h, h→v
/// (through Wᵀ), v'→h', and the two gradient products vᵀh. PCD's h→v starts from its
/// chains (batch-sized even for the last, short batch). Operands are contiguous batches,
/// so nothing but the products is timed.
fn gemm_epoch(
    data: ArrayView2<f32>,
    w: ArrayView2<f32>,
    wt: ArrayView2<f32>,
    batch: usize,
    persistent: bool,
    mul: Mul,
) -> f64 {
    let chains = mul(data.slice(s![..batch.min(data.nrows()), ..]), w);
    let start = clock_ms();
    for x in data.axis_chunks_iter(Axis(0), batch) {
        let h0 = mul(x, w);
        let vk = mul(if persistent { chains.view() } else { h0.view() }, wt);
        let hk = mul(vk.view(), w);
        let g0 = mul(x.t(), h0.view());
        let gk = mul(vk.t(), hk.view());
        black_box((g0, gk));
    }
    clock_ms() - start
}

/// The trainer's own product ([`matmul`]: an AVX-512 kernel for small shapes where the
/// CPU has it, else matrixmultiply, split over threads when large), into a fresh matrix
/// like `dot`.
fn own_gemm(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let mut c = Array2::zeros((a.nrows(), b.ncols()));
    matmul(1.0, a, b, 0.0, c.view_mut());
    c
}

/// The `gemm` crate's product on rayon's threads (it splits only products large enough).
fn library_gemm(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    gemm_crate(a, b, gemm::Parallelism::Rayon(0))
}

/// The `gemm` crate's product on the calling thread.
fn library_gemm_one_thread(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    gemm_crate(a, b, gemm::Parallelism::None)
}

fn gemm_crate(a: ArrayView2<f32>, b: ArrayView2<f32>, threads: gemm::Parallelism) -> Array2<f32> {
    let ((m, k), n) = (a.dim(), b.ncols());
    let mut c = Array2::<f32>::zeros((m, n));
    let [ars, acs] = [a.strides()[0], a.strides()[1]];
    let [brs, bcs] = [b.strides()[0], b.strides()[1]];
    // SAFETY: the pointers and element strides come from views of shapes m×k, k×n and the
    // fresh m×n row-major c, which the product writes (read_dst false: c ← 1·a·b).
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            1,
            n as isize,
            false,
            a.as_ptr(),
            acs,
            ars,
            b.as_ptr(),
            bcs,
            brs,
            0.0,
            1.0,
            false,
            false,
            false,
            threads,
        );
    }
    c
}

/// Plain ndarray product (matrixmultiply, one thread).
fn dot(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    a.dot(&b)
}

/// The same product with the output's longer side cut into one block per rayon thread:
/// the most a product can get from this machine's cores without another GEMM library.
fn split_dot(a: ArrayView2<f32>, b: ArrayView2<f32>) -> Array2<f32> {
    let (m, n) = (a.nrows(), b.ncols());
    let mut c = Array2::zeros((m, n));
    let threads = rayon::current_num_threads().max(1);
    if n >= m {
        let width = n.div_ceil(threads).max(1);
        let pieces: Vec<_> = c
            .axis_chunks_iter_mut(Axis(1), width)
            .zip(b.axis_chunks_iter(Axis(1), width))
            .collect();
        pieces
            .into_par_iter()
            .for_each(|(mut c, b)| general_mat_mul(1.0, &a, &b, 0.0, &mut c));
    } else {
        let width = m.div_ceil(threads).max(1);
        let pieces: Vec<_> = c
            .axis_chunks_iter_mut(Axis(0), width)
            .zip(a.axis_chunks_iter(Axis(0), width))
            .collect();
        pieces
            .into_par_iter()
            .for_each(|(mut c, a)| general_mat_mul(1.0, &a, &b, 0.0, &mut c));
    }
    c
}
