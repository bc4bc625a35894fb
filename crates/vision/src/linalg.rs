//! The little dense linear algebra the patch dictionary needs, without system BLAS/LAPACK:
//! covariance, a symmetric eigen-solver (cyclic Jacobi) and the ZCA whitening matrix.

use ndarray::{s, Array1, Array2, ArrayView2, Axis};
use rayon::prelude::*;

/// Rows per block in parallel passes; fixed so results do not depend on the thread count.
pub(crate) const BLOCK_ROWS: usize = 2048;

/// Eigen-decomposition of a symmetric matrix by cyclic Jacobi rotations: returns the
/// eigenvalues and the eigenvectors as columns. Accurate and simple; O(n³) per sweep is
/// fine for patch dimensions (≤ 192).
pub(crate) fn symmetric_eigen(matrix: &Array2<f64>) -> (Array1<f64>, Array2<f64>) {
    let n = matrix.nrows();
    let mut a = matrix.clone();
    let mut v = Array2::<f64>::eye(n);
    let scale: f64 = a.iter().map(|x| x * x).sum::<f64>().max(f64::MIN_POSITIVE);
    for _sweep in 0..64 {
        let off: f64 = (0..n)
            .flat_map(|p| (p + 1..n).map(move |q| (p, q)))
            .map(|(p, q)| a[[p, q]] * a[[p, q]])
            .sum();
        if off <= 1e-26 * scale {
            break;
        }
        for p in 0..n {
            for q in p + 1..n {
                let apq = a[[p, q]];
                if apq == 0.0 {
                    continue;
                }
                let theta = (a[[q, q]] - a[[p, p]]) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..n {
                    let (akp, akq) = (a[[k, p]], a[[k, q]]);
                    a[[k, p]] = c * akp - s * akq;
                    a[[k, q]] = s * akp + c * akq;
                }
                for k in 0..n {
                    let (apk, aqk) = (a[[p, k]], a[[q, k]]);
                    a[[p, k]] = c * apk - s * aqk;
                    a[[q, k]] = s * apk + c * aqk;
                }
                for k in 0..n {
                    let (vkp, vkq) = (v[[k, p]], v[[k, q]]);
                    v[[k, p]] = c * vkp - s * vkq;
                    v[[k, q]] = s * vkp + c * vkq;
                }
            }
        }
    }
    (a.diag().to_owned(), v)
}

/// Column means and covariance (divided by n − 1) of `data`, accumulated in f64 over
/// fixed row blocks so the result is the same for any thread count.
pub(crate) fn mean_and_covariance(data: ArrayView2<f32>) -> (Array1<f64>, Array2<f64>) {
    let (n, d) = data.dim();
    let mut mean = Array1::<f64>::zeros(d);
    for row in data.rows() {
        mean.zip_mut_with(&row, |m, &x| *m += f64::from(x));
    }
    mean /= n.max(1) as f64;
    let mean_f32 = mean.mapv(|m| m as f32);
    let blocks: Vec<Array2<f64>> = data
        .axis_chunks_iter(Axis(0), BLOCK_ROWS)
        .collect::<Vec<_>>()
        .into_par_iter()
        .map(|block| {
            let centred = &block - &mean_f32;
            centred.t().dot(&centred).mapv(f64::from)
        })
        .collect();
    let mut cov = Array2::<f64>::zeros((d, d));
    for b in &blocks {
        cov += b;
    }
    cov /= (n.max(2) - 1) as f64;
    (mean, cov)
}

/// ZCA whitening (Bell & Sejnowski 1997): W = V diag(1/sqrt(λ + eps)) Vᵀ. Whitened data
/// (x − mean)·W has (near-)identity covariance while staying as close as possible to the
/// original patch, so atoms still look like image patches. `eps` damps noise directions.
pub(crate) fn zca(data: ArrayView2<f32>, eps: f64) -> (Array1<f32>, Array2<f32>) {
    let (mean, cov) = mean_and_covariance(data);
    let (values, vectors) = symmetric_eigen(&cov);
    let scale = values.mapv(|l| 1.0 / (l.max(0.0) + eps).sqrt());
    let scaled = &vectors * &scale.slice(s![ndarray::NewAxis, ..]);
    let w = scaled.dot(&vectors.t());
    (mean.mapv(|m| m as f32), w.mapv(|x| x as f32))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn random_matrix(rows: usize, cols: usize, seed: u64) -> Array2<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        Array2::from_shape_fn((rows, cols), |_| rng.random::<f32>() - 0.5)
    }

    #[test]
    fn jacobi_reconstructs_and_is_orthonormal() {
        let b = random_matrix(30, 30, 1).mapv(f64::from);
        let sym = &b + &b.t();
        let (values, vectors) = symmetric_eigen(&sym);
        let rebuilt = (&vectors * &values.slice(s![ndarray::NewAxis, ..])).dot(&vectors.t());
        let err = (&rebuilt - &sym).iter().fold(0f64, |m, x| m.max(x.abs()));
        assert!(err < 1e-10, "reconstruction error {err}");
        let gram = vectors.t().dot(&vectors);
        let err = (&gram - &Array2::<f64>::eye(30))
            .iter()
            .fold(0f64, |m, x| m.max(x.abs()));
        assert!(err < 1e-10, "orthonormality error {err}");
    }

    #[test]
    fn jacobi_known_eigenvalues() {
        // source: worked by hand — [[2,1],[1,2]] has eigenvalues 1 and 3.
        let m = ndarray::array![[2.0, 1.0], [1.0, 2.0]];
        let (mut values, _) = symmetric_eigen(&m);
        values.as_slice_mut().unwrap().sort_by(f64::total_cmp);
        assert!((values[0] - 1.0).abs() < 1e-12 && (values[1] - 3.0).abs() < 1e-12);
    }

    #[test]
    fn zca_whitened_covariance_is_identity() {
        // Strongly correlated data: random mixing of independent uniforms.
        let sources = random_matrix(20_000, 12, 2);
        let mixing = random_matrix(12, 12, 3) + Array2::<f32>::eye(12);
        let data = sources.dot(&mixing) + 3.0;
        let (mean, w) = zca(data.view(), 1e-9);
        let whitened = (&data - &mean).dot(&w);
        let (m2, cov) = mean_and_covariance(whitened.view());
        assert!(m2.iter().all(|m| m.abs() < 1e-3), "{m2}");
        let err = (&cov - &Array2::<f64>::eye(12))
            .iter()
            .fold(0f64, |m, x| m.max(x.abs()));
        assert!(err < 1e-3, "max deviation from identity {err}");
        // ZCA (unlike PCA whitening) gives a symmetric matrix.
        let asym = (&w - &w.t()).iter().fold(0f32, |m, x| m.max(x.abs()));
        assert!(asym < 1e-4);
    }
}
