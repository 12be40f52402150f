//! The little dense linear algebra the fitter needs: symmetric positive-definite matrices of
//! size 1–3 (the estimated log-parameters), by Cholesky factorisation.

/// Most parameters estimated at once (ln CL, ln V, ln ka).
pub const MAX: usize = 3;

/// A square matrix of size `n` ≤ [`MAX`], stored in the top-left corner.
pub type Mat = [[f64; MAX]; MAX];

/// Lower-triangular Cholesky factor L with A = L·Lᵀ, or `None` when A is not positive definite.
pub fn cholesky(a: &Mat, n: usize) -> Option<Mat> {
    let mut l = [[0.0; MAX]; MAX];
    for i in 0..n {
        for j in 0..=i {
            let s: f64 = (0..j).map(|k| l[i][k] * l[j][k]).sum();
            if i == j {
                let d = a[i][i] - s;
                if !(d > 0.0 && d.is_finite()) {
                    return None;
                }
                l[i][i] = d.sqrt();
            } else {
                l[i][j] = (a[i][j] - s) / l[j][j];
            }
        }
    }
    Some(l)
}

/// Solve A·x = b given A's Cholesky factor.
pub fn cholesky_solve(l: &Mat, n: usize, b: &[f64]) -> [f64; MAX] {
    let mut y = [0.0; MAX];
    for i in 0..n {
        y[i] = (b[i] - (0..i).map(|k| l[i][k] * y[k]).sum::<f64>()) / l[i][i];
    }
    let mut x = [0.0; MAX];
    for i in (0..n).rev() {
        x[i] = (y[i] - (i + 1..n).map(|k| l[k][i] * x[k]).sum::<f64>()) / l[i][i];
    }
    x
}

/// Inverse of a symmetric positive-definite matrix, or `None` when it is not one.
pub fn spd_inverse(a: &Mat, n: usize) -> Option<Mat> {
    let l = cholesky(a, n)?;
    let mut inv = [[0.0; MAX]; MAX];
    for j in 0..n {
        let mut e = [0.0; MAX];
        e[j] = 1.0;
        let col = cholesky_solve(&l, n, &e);
        for i in 0..n {
            inv[i][j] = col[i];
        }
    }
    Some(inv)
}

/// ln det A from its Cholesky factor.
pub fn log_det(l: &Mat, n: usize) -> f64 {
    2.0 * (0..n).map(|i| l[i][i].ln()).sum::<f64>()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inverse_times_matrix_is_identity() {
        let a: Mat = [[4.0, 1.2, -0.3], [1.2, 2.0, 0.4], [-0.3, 0.4, 1.5]];
        let inv = spd_inverse(&a, 3).unwrap();
        for i in 0..3 {
            for j in 0..3 {
                let p: f64 = (0..3).map(|k| a[i][k] * inv[k][j]).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((p - want).abs() < 1e-14);
            }
        }
        // det = 4(3 − 0.16) − 1.2(1.8 + 0.12) − 0.3(0.48 + 0.6) = 11.36 − 2.304 − 0.324
        let l = cholesky(&a, 3).unwrap();
        assert!((log_det(&l, 3) - (11.36f64 - 2.304 - 0.324).ln()).abs() < 1e-13);
        assert!(cholesky(&[[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0; 3]], 2).is_none());
    }
}
