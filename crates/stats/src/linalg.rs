//! Small dense symmetric linear algebra for MBAR: a cyclic Jacobi eigensolver and the
//! Moore–Penrose pseudo-inverse built on it.
//!
//! MBAR's matrices are K×K with K the number of thermodynamic states (a few to a few
//! hundred), so an O(K³) Jacobi method is fast enough, needs no dependency, and is
//! accurate to round-off for symmetric matrices, including singular ones (MBAR's
//! Hessian and covariance kernels always have the all-ones null direction).

/// Eigenvalues and orthonormal eigenvectors of a symmetric matrix.
pub(crate) struct SymmetricEigen {
    /// Eigenvalues, in no particular order.
    pub values: Vec<f64>,
    /// Eigenvectors as columns of a row-major m×m matrix: vectors[i * m + j] is
    /// component i of eigenvector j.
    pub vectors: Vec<f64>,
}

/// Diagonalises the symmetric row-major m×m matrix `a` by cyclic Jacobi rotations.
///
/// Sweeps until the off-diagonal mass is below 1e-30 of the total (or 100 sweeps, far
/// more than the ~10 that quadratic convergence needs).
pub(crate) fn symmetric_eigen(a: &[f64], m: usize) -> SymmetricEigen {
    let mut a = a.to_vec();
    let mut v = identity(m);
    let total: f64 = a.iter().map(|x| x * x).sum();
    for _sweep in 0..100 {
        let off: f64 = (0..m)
            .flat_map(|i| (0..m).filter(move |&j| j != i).map(move |j| (i, j)))
            .map(|(i, j)| a[i * m + j].powi(2))
            .sum();
        if off <= 1e-30 * total || off == 0.0 {
            break;
        }
        for p in 0..m {
            for q in (p + 1)..m {
                rotate(&mut a, &mut v, m, p, q);
            }
        }
    }
    SymmetricEigen {
        values: (0..m).map(|i| a[i * m + i]).collect(),
        vectors: v,
    }
}

/// Applies the Jacobi rotation that zeroes a[p][q] to `a` and accumulates it in `v`.
fn rotate(a: &mut [f64], v: &mut [f64], m: usize, p: usize, q: usize) {
    let apq = a[p * m + q];
    if apq == 0.0 {
        return;
    }
    let theta = (a[q * m + q] - a[p * m + p]) / (2.0 * apq);
    let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
    let t = if theta == 0.0 { 1.0 } else { t };
    let c = 1.0 / (t * t + 1.0).sqrt();
    let s = t * c;
    for k in 0..m {
        let akp = a[k * m + p];
        let akq = a[k * m + q];
        a[k * m + p] = c * akp - s * akq;
        a[k * m + q] = s * akp + c * akq;
    }
    for k in 0..m {
        let apk = a[p * m + k];
        let aqk = a[q * m + k];
        a[p * m + k] = c * apk - s * aqk;
        a[q * m + k] = s * apk + c * aqk;
    }
    for k in 0..m {
        let vkp = v[k * m + p];
        let vkq = v[k * m + q];
        v[k * m + p] = c * vkp - s * vkq;
        v[k * m + q] = s * vkp + c * vkq;
    }
}

/// Returns the pseudo-inverse of a symmetric matrix, dropping eigenvalues whose
/// magnitude is at most `rcond` times the largest (numpy's `pinv(rcond=…)` rule).
pub(crate) fn symmetric_pseudo_inverse(a: &[f64], m: usize, rcond: f64) -> Vec<f64> {
    let eig = symmetric_eigen(a, m);
    let largest = eig.values.iter().fold(0.0f64, |acc, v| acc.max(v.abs()));
    let mut out = vec![0.0; m * m];
    for (j, &lambda) in eig.values.iter().enumerate() {
        if lambda.abs() <= rcond * largest || lambda == 0.0 {
            continue;
        }
        for r in 0..m {
            let vr = eig.vectors[r * m + j] / lambda;
            for c in 0..m {
                out[r * m + c] += vr * eig.vectors[c * m + j];
            }
        }
    }
    out
}

/// Returns the row-major m×m identity.
pub(crate) fn identity(m: usize) -> Vec<f64> {
    let mut out = vec![0.0; m * m];
    for i in 0..m {
        out[i * m + i] = 1.0;
    }
    out
}

/// Returns the product of row-major matrices a (r×k) and b (k×c).
pub(crate) fn matmul(a: &[f64], b: &[f64], r: usize, k: usize, c: usize) -> Vec<f64> {
    let mut out = vec![0.0; r * c];
    for i in 0..r {
        for l in 0..k {
            let ail = a[i * k + l];
            for j in 0..c {
                out[i * c + j] += ail * b[l * c + j];
            }
        }
    }
    out
}

/// Returns the transpose of a row-major r×c matrix.
pub(crate) fn transpose(a: &[f64], r: usize, c: usize) -> Vec<f64> {
    let mut out = vec![0.0; r * c];
    for i in 0..r {
        for j in 0..c {
            out[j * r + i] = a[i * c + j];
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn eigen_reconstructs_the_matrix() {
        let a = [4.0, 1.0, 2.0, 1.0, 3.0, 0.5, 2.0, 0.5, 5.0];
        let e = symmetric_eigen(&a, 3);
        let mut d = vec![0.0; 9];
        for i in 0..3 {
            d[i * 3 + i] = e.values[i];
        }
        let vd = matmul(&e.vectors, &d, 3, 3, 3);
        let back = matmul(&vd, &transpose(&e.vectors, 3, 3), 3, 3, 3);
        for (x, y) in back.iter().zip(&a) {
            assert!((x - y).abs() < 1e-13);
        }
        // The trace is the sum of the eigenvalues.
        assert!((e.values.iter().sum::<f64>() - 12.0).abs() < 1e-13);
    }

    #[test]
    fn pseudo_inverse_of_singular_matrix() {
        // The Laplacian-like matrix [[1,-1],[-1,1]] has eigenvalues 0 and 2; its
        // pseudo-inverse is itself divided by 4.
        let a = [1.0, -1.0, -1.0, 1.0];
        let p = symmetric_pseudo_inverse(&a, 2, 1e-10);
        for (x, y) in p.iter().zip(&a) {
            assert!((x - y / 4.0).abs() < 1e-15);
        }
    }
}
