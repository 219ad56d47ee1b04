//! One coupling layer of the stack: a fixed split of the coordinates into a conditioning
//! set A and a transformed set B, a conditioner network that reads x_A, and an
//! element-wise bijection of each x_b with parameters from the conditioner.
//!
//! Generation direction (latent → data): y_A = x_A, y_b = g(x_b; θ_b(x_A)), log|det| =
//! Σ_b ln g'(x_b). Inversion applies g⁻¹ with the same θ (x_A is unchanged), log|det| =
//! −Σ_b ln g'. Backward passes recompute the conditioner from the layer's input (one
//! extra forward pass instead of a stored activation per layer).

use super::net::{self, NetShape, NetTape};
use crate::real::Real;
use crate::spline::{self, SplineShape};

/// The element-wise map of a coupling layer.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Transform {
    /// y = x e^s + t with s = clamp · tanh(raw / clamp).
    Affine {
        /// Bound on |s|.
        clamp: f64,
    },
    /// A monotonic rational-quadratic spline on [−bound, bound], identity outside.
    Spline(SplineShape),
}

impl Transform {
    /// Conditioner outputs per transformed coordinate.
    pub fn n_params(&self) -> usize {
        match self {
            Transform::Affine { .. } => 2,
            Transform::Spline(shape) => shape.n_params(),
        }
    }

    /// The map (or its inverse) of one value: (output, log-derivative).
    #[inline]
    fn apply<T: Real>(&self, theta: &[T], x: T, inverse: bool) -> (T, T) {
        match *self {
            Transform::Affine { clamp } => {
                let c = T::of(clamp);
                let s = c * (theta[0] / c).tanh();
                let t = theta[1];
                if inverse {
                    ((x - t) * (-s).exp(), -s)
                } else {
                    (x * s.exp() + t, s)
                }
            }
            Transform::Spline(ref shape) => {
                if inverse {
                    spline::inverse(shape, theta, x)
                } else {
                    spline::forward(shape, theta, x)
                }
            }
        }
    }

    /// Reverse-mode gradient of [`Transform::apply`] at input `x`: given dL/d(output)
    /// `gy` and dL/d(log-derivative) `gl`, adds dL/dθ into `g_theta` and returns dL/dx.
    #[inline]
    fn backward<T: Real>(
        &self,
        theta: &[T],
        x: T,
        gy: T,
        gl: T,
        inverse: bool,
        g_theta: &mut [T],
    ) -> T {
        match *self {
            Transform::Affine { clamp } => {
                let c = T::of(clamp);
                let s = c * (theta[0] / c).tanh();
                let t = theta[1];
                let (gx, gt, gs) = if inverse {
                    let e = (-s).exp();
                    let y = (x - t) * e;
                    let gx = gy * e;
                    (gx, -gx, -gy * y - gl)
                } else {
                    let e = s.exp();
                    (gy * e, gy, gy * x * e + gl)
                };
                let r = s / c;
                g_theta[0] += gs * (T::one() - r * r);
                g_theta[1] += gt;
                gx
            }
            Transform::Spline(ref shape) => {
                if inverse {
                    spline::inverse_backward(shape, theta, x, gy, gl, g_theta)
                } else {
                    spline::forward_backward(shape, theta, x, gy, gl, g_theta)
                }
            }
        }
    }
}

/// One coupling layer.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Coupling {
    /// Coordinates read by the conditioner.
    pub cond_idx: Vec<usize>,
    /// Coordinates transformed.
    pub trans_idx: Vec<usize>,
    /// The conditioner.
    pub net: NetShape,
    /// The element-wise map.
    pub transform: Transform,
}

/// Scratch of one coupling layer's passes.
#[derive(Debug, Default)]
pub(crate) struct CouplingTape<T> {
    net: NetTape<T>,
    g_theta: Vec<T>,
    g_net_in: Vec<T>,
}

impl Coupling {
    /// Number of parameters (the conditioner's).
    pub fn n_params(&self) -> usize {
        self.net.n_params()
    }

    /// Row of the conditioner's output that holds θ of transformed element b of row i.
    #[inline]
    fn theta_row(&self, i: usize, b: usize) -> usize {
        if self.net.conv.is_some() {
            i * self.net.sites() + self.trans_idx[b]
        } else {
            i * self.trans_idx.len() + b
        }
    }

    /// Runs the conditioner on the rows of `x` ([n, d]).
    fn condition<T: Real>(&self, params: &[T], x: &[T], d: usize, tape: &mut NetTape<T>) {
        let n = x.len() / d;
        let input = tape.input(&self.net, n);
        if self.net.conv.is_some() {
            // One channel: the field on the conditioning sites, zero on the others.
            input.fill(T::zero());
            for (row_in, row) in input.chunks_mut(d).zip(x.chunks(d)) {
                for &a in &self.cond_idx {
                    row_in[a] = row[a];
                }
            }
        } else {
            let na = self.cond_idx.len();
            for (row_in, row) in input.chunks_mut(na).zip(x.chunks(d)) {
                for (v, &a) in row_in.iter_mut().zip(&self.cond_idx) {
                    *v = row[a];
                }
            }
        }
        net::forward(&self.net, params, n, tape);
    }

    /// Applies the layer (or its inverse) in place to the rows of `x` ([n, d]) and adds
    /// each row's log|det| to `log_det`.
    pub fn apply<T: Real>(
        &self,
        params: &[T],
        x: &mut [T],
        d: usize,
        log_det: &mut [T],
        inverse: bool,
        tape: &mut CouplingTape<T>,
    ) {
        self.condition(params, x, d, &mut tape.net);
        let p = self.transform.n_params();
        let out = tape.net.output();
        for (i, (row, ld)) in x.chunks_mut(d).zip(log_det.iter_mut()).enumerate() {
            for (b, &t) in self.trans_idx.iter().enumerate() {
                let r = self.theta_row(i, b);
                let (y, l) = self
                    .transform
                    .apply(&out[r * p..(r + 1) * p], row[t], inverse);
                row[t] = y;
                *ld += l;
            }
        }
    }

    /// Backward pass of [`Coupling::apply`] at the layer's input `x_in` ([n, d]):
    /// `g` holds dL/d(output) on entry and dL/d(input) on return; `g_ld[i]` is
    /// dL/d(log|det| of row i); dL/dparams is added into `g_params`.
    #[allow(clippy::too_many_arguments)]
    pub fn backward<T: Real>(
        &self,
        params: &[T],
        x_in: &[T],
        d: usize,
        g: &mut [T],
        g_ld: &[T],
        inverse: bool,
        g_params: &mut [T],
        tape: &mut CouplingTape<T>,
    ) {
        let n = x_in.len() / d;
        self.condition(params, x_in, d, &mut tape.net);
        let p = self.transform.n_params();
        let rows = n
            * self.net.sites()
            * if self.net.conv.is_some() {
                1
            } else {
                self.trans_idx.len()
            };
        tape.g_theta.clear();
        tape.g_theta.resize(rows * p, T::zero());
        {
            let out = tape.net.output();
            for i in 0..n {
                for (b, &t) in self.trans_idx.iter().enumerate() {
                    let r = self.theta_row(i, b);
                    let gx = self.transform.backward(
                        &out[r * p..(r + 1) * p],
                        x_in[i * d + t],
                        g[i * d + t],
                        g_ld[i],
                        inverse,
                        &mut tape.g_theta[r * p..(r + 1) * p],
                    );
                    g[i * d + t] = gx;
                }
            }
        }
        let n_in = n * self.net.sites() * self.net.sizes[0];
        tape.g_net_in.resize(n_in, T::zero());
        net::backward(
            &self.net,
            params,
            n,
            &mut tape.net,
            &tape.g_theta,
            g_params,
            &mut tape.g_net_in,
        );
        if self.net.conv.is_some() {
            for (grow, gin) in g.chunks_mut(d).zip(tape.g_net_in.chunks(d)) {
                for &a in &self.cond_idx {
                    grow[a] += gin[a];
                }
            }
        } else {
            let na = self.cond_idx.len();
            for (grow, gin) in g.chunks_mut(d).zip(tape.g_net_in.chunks(na)) {
                for (&a, &v) in self.cond_idx.iter().zip(gin) {
                    grow[a] += v;
                }
            }
        }
    }
}
