//! Dense linear algebra for the reference computations of the tests, from `nalgebra` (a
//! general-purpose library, independent of the crate's own small routines). Matrices are
//! row-major `n × n` slices.

use nalgebra::DMatrix;

fn matrix(a: &[f64], n: usize) -> DMatrix<f64> {
    DMatrix::from_row_slice(n, n, a)
}

fn row_major(m: &DMatrix<f64>) -> Vec<f64> {
    let n = m.nrows();
    (0..n * n).map(|k| m[(k / n, k % n)]).collect()
}

/// The lower Cholesky factor `L` of a symmetric positive-definite `a` (`a = L Lᵀ`).
pub fn cholesky(a: &[f64], n: usize) -> Option<Vec<f64>> {
    nalgebra::Cholesky::new(matrix(a, n)).map(|c| row_major(&c.l()))
}

/// `(L Lᵀ)⁻¹` from the Cholesky factor `L`.
pub fn cholesky_inverse(l: &[f64], n: usize) -> Vec<f64> {
    let l = matrix(l, n);
    let a = &l * l.transpose();
    row_major(
        &a.try_inverse()
            .expect("a Cholesky factor gives an invertible matrix"),
    )
}

/// `log det(L Lᵀ)` from the Cholesky factor `L`.
pub fn log_det_from_cholesky(l: &[f64], n: usize) -> f64 {
    let l = matrix(l, n);
    (&l * l.transpose()).determinant().ln()
}

/// The inverse of a lower-triangular matrix.
pub fn lower_triangular_inverse(l: &[f64], n: usize) -> Option<Vec<f64>> {
    matrix(l, n).try_inverse().map(|m| row_major(&m))
}
