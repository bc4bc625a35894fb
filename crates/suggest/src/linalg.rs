//! The one piece of dense linear algebra ridge regression needs.

use ndarray::{Array2, ArrayView2};

use crate::SuggestError;

/// Solves `A X = B` for symmetric positive definite `A` (n×n) and `B` (n×m)
/// by Cholesky factorisation `A = L Lᵀ`, then forward and back substitution.
/// Works on flat row-major copies so the inner loops run over contiguous memory.
pub(crate) fn cholesky_solve(
    a: ArrayView2<f64>,
    b: ArrayView2<f64>,
) -> Result<Array2<f64>, SuggestError> {
    let n = a.nrows();
    let m = b.ncols();
    let mut l: Vec<f64> = a.iter().copied().collect();
    for j in 0..n {
        let row_j = &mut l[j * n..j * n + n];
        let pivot = row_j[j] - row_j[..j].iter().map(|v| v * v).sum::<f64>();
        if pivot.is_nan() || pivot <= 0.0 {
            return Err(SuggestError::NotPositiveDefinite { pivot: j });
        }
        row_j[j] = pivot.sqrt();
        for i in j + 1..n {
            let (upper, lower) = l.split_at_mut(i * n);
            let row_j = &upper[j * n..j * n + n];
            let row_i = &mut lower[..n];
            let dot: f64 = row_i[..j].iter().zip(&row_j[..j]).map(|(x, y)| x * y).sum();
            row_i[j] = (row_i[j] - dot) / row_j[j];
        }
    }
    let mut x: Vec<f64> = b.iter().copied().collect();
    // forward: L Y = B
    for i in 0..n {
        let (solved, rest) = x.split_at_mut(i * m);
        let xi = &mut rest[..m];
        for k in 0..i {
            let lik = l[i * n + k];
            for (v, s) in xi.iter_mut().zip(&solved[k * m..k * m + m]) {
                *v -= lik * s;
            }
        }
        xi.iter_mut().for_each(|v| *v /= l[i * n + i]);
    }
    // backward: Lᵀ X = Y
    for i in (0..n).rev() {
        let (head, solved) = x.split_at_mut((i + 1) * m);
        let xi = &mut head[i * m..];
        for k in i + 1..n {
            let lki = l[k * n + i];
            for (v, s) in xi.iter_mut().zip(&solved[(k - i - 1) * m..(k - i) * m]) {
                *v -= lki * s;
            }
        }
        xi.iter_mut().for_each(|v| *v /= l[i * n + i]);
    }
    Ok(Array2::from_shape_fn((n, m), |(i, j)| x[i * m + j]))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn solves_small_system_worked_by_hand() {
        // worked by hand: [[4,2],[2,3]]⁻¹ = [[3,-2],[-2,4]]/8, so the solution for
        // b = (2,1) is (0.5, 0) and for b = (0,8) is (-2, 4).
        let a = array![[4.0, 2.0], [2.0, 3.0]];
        let x = cholesky_solve(a.view(), array![[2.0, 0.0], [1.0, 8.0]].view()).unwrap();
        for (got, want) in x.iter().zip([0.5, -2.0, 0.0, 4.0]) {
            assert!((got - want).abs() < 1e-12, "{x}");
        }
    }

    #[test]
    fn solves_larger_system_to_residual_precision() {
        let n = 30;
        let g = Array2::from_shape_fn((n, n), |(i, j)| ((i * 7 + j * 13) % 11) as f64 - 5.0);
        let a = g.t().dot(&g) + Array2::<f64>::eye(n);
        let b = Array2::from_shape_fn((n, 3), |(i, j)| (i + j) as f64);
        let x = cholesky_solve(a.view(), b.view()).unwrap();
        let residual = (a.dot(&x) - &b).iter().fold(0.0f64, |m, v| m.max(v.abs()));
        assert!(residual < 1e-8, "{residual}");
    }

    #[test]
    fn rejects_indefinite_matrix() {
        let a = array![[1.0, 2.0], [2.0, 1.0]];
        let e = cholesky_solve(a.view(), array![[1.0], [1.0]].view());
        assert!(matches!(
            e,
            Err(SuggestError::NotPositiveDefinite { pivot: 1 })
        ));
    }
}
