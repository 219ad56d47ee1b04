//! The fixed centre-of-mass frame: an orthonormal (Helmert) basis of the subspace of
//! zero centre of mass, applied in O(N d) without storing the basis.
//!
//! For N particles the Helmert vectors are e_k = (1, .., 1, -k, 0, ..) / sqrt(k (k+1)),
//! k = 1..N-1, with k ones. They are orthonormal and orthogonal to (1, .., 1), so the map
//! y = E^T x (data to flow) discards exactly the centre of mass and x = E y (flow to
//! data) returns a configuration with zero centre of mass. Both have log-determinant 0
//! as maps between the flow space and the zero-centre-of-mass hyperplane, which is the
//! measure on which the flow's density is defined. Rotations are not removed: they form
//! a compact group, so the density stays proper, and the flow must learn the spread over
//! orientations (a confining wall in the energy keeps that spread finite in practice).
//! Permutations of identical particles are not symmetrised: the flow models the
//! labelling present in its training data.

use crate::real::Real;
use crate::spec::FrameSpec;

/// The frame as a map between `data_dim` data coordinates and `model_dim` flow ones.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Frame {
    /// `None` for the identity frame, or (N, d) for the centre-of-mass frame.
    com: Option<(usize, usize)>,
}

impl Frame {
    pub(crate) fn new(spec: &FrameSpec) -> Self {
        match *spec {
            FrameSpec::Identity => Frame { com: None },
            FrameSpec::CentreOfMass {
                n_particles,
                spatial_dim,
            } => Frame {
                com: Some((n_particles, spatial_dim)),
            },
        }
    }

    /// y = E^T x for `rows` configurations (data row length N d, flow row length (N-1) d).
    /// This is also the gradient map of `to_data` (g_y = E^T g_x).
    pub(crate) fn to_model<T: Real>(&self, rows: usize, x: &[T], y: &mut [T]) {
        let Some((np, d)) = self.com else {
            y.copy_from_slice(x);
            return;
        };
        let (dx, dy) = (np * d, (np - 1) * d);
        for r in 0..rows {
            let xr = &x[r * dx..(r + 1) * dx];
            let yr = &mut y[r * dy..(r + 1) * dy];
            for a in 0..d {
                let mut prefix = 0.0f64;
                for k in 1..np {
                    prefix += xr[(k - 1) * d + a].to64();
                    let kf = k as f64;
                    let v = (prefix - kf * xr[k * d + a].to64()) / (kf * (kf + 1.0)).sqrt();
                    yr[(k - 1) * d + a] = T::of(v);
                }
            }
        }
    }

    /// x = E y: the inverse of `to_model` on the zero-centre-of-mass hyperplane, and the
    /// gradient map of `to_model` (g_x = E g_y).
    pub(crate) fn to_data<T: Real>(&self, rows: usize, y: &[T], x: &mut [T]) {
        let Some((np, d)) = self.com else {
            x.copy_from_slice(y);
            return;
        };
        let (dx, dy) = (np * d, (np - 1) * d);
        for r in 0..rows {
            let yr = &y[r * dy..(r + 1) * dy];
            let xr = &mut x[r * dx..(r + 1) * dx];
            for a in 0..d {
                // x_i (1-based) = sum_{k >= i} y_k / sqrt(k(k+1)) - (i-1) y_{i-1} / sqrt((i-1) i).
                let mut suffix = 0.0f64;
                for i in (1..=np).rev() {
                    if i < np {
                        let kf = i as f64;
                        suffix += yr[(i - 1) * d + a].to64() / (kf * (kf + 1.0)).sqrt();
                    }
                    let mut v = suffix;
                    if i >= 2 {
                        let kf = (i - 1) as f64;
                        v -= kf * yr[(i - 2) * d + a].to64() / (kf * (kf + 1.0)).sqrt();
                    }
                    xr[(i - 1) * d + a] = T::of(v);
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn helmert_frame_is_orthonormal_and_removes_the_centre_of_mass() {
        let f = Frame::new(&FrameSpec::CentreOfMass {
            n_particles: 5,
            spatial_dim: 2,
        });
        // Columns of E: images of unit vectors in flow space must be orthonormal and
        // have zero centre of mass.
        let dy = 8;
        let mut cols = vec![vec![0.0f64; 10]; dy];
        for (j, col) in cols.iter_mut().enumerate() {
            let mut e = vec![0.0; dy];
            e[j] = 1.0;
            f.to_data(1, &e, col);
            let (sx, sy) =
                (0..5).fold((0.0, 0.0), |(a, b), i| (a + col[2 * i], b + col[2 * i + 1]));
            assert!(sx.abs() < 1e-12 && sy.abs() < 1e-12);
        }
        for i in 0..dy {
            for j in 0..dy {
                let dot: f64 = cols[i].iter().zip(&cols[j]).map(|(a, b)| a * b).sum();
                let want = if i == j { 1.0 } else { 0.0 };
                assert!((dot - want).abs() < 1e-12, "E^T E [{i},{j}] = {dot}");
            }
        }
        // to_model inverts to_data.
        let y: Vec<f64> = (0..dy).map(|i| (i as f64).sin()).collect();
        let mut x = vec![0.0; 10];
        let mut y2 = vec![0.0; dy];
        f.to_data(1, &y, &mut x);
        f.to_model(1, &x, &mut y2);
        assert!(y.iter().zip(&y2).all(|(a, b)| (a - b).abs() < 1e-12));
    }
}
