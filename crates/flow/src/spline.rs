//! Element-wise monotonic rational-quadratic splines (Durkan, Bekasov, Murray &
//! Papamakarios, Neural Spline Flows, NeurIPS 2019) and their circular variant for
//! angles (Rezende et al., Normalizing Flows on Tori and Spheres, ICML 2020), with
//! hand-derived reverse-mode gradients.
//!
//! Owns: the parametrisation of one scalar spline by unconstrained numbers, its
//! forward and inverse maps with their log-derivatives, and the gradients of both with
//! respect to the parameters and the input. Knows nothing of conditioners or layers.
//!
//! # Conventions
//!
//! A spline has K bins (2 <= K <= 64) on [-B, B]. Its unconstrained parameters `theta`
//! are, in this order:
//!
//! - K raw widths a_j:  w_j = 2B (m + (1 - K m) softmax(a)_j), m = [`MIN_BIN`];
//! - K raw heights b_j: h_j = 2B (m + (1 - K m) softmax(b)_j);
//! - raw knot slopes r_i: δ_i = [`MIN_SLOPE`] + softplus(r_i + c), with c = ln(e^(1 - MIN_SLOPE) - 1)
//!   so that r_i = 0 gives δ_i = 1 exactly.
//!
//! Knots: x_0 = y_0 = -B, x_{k+1} = x_k + w_k, y_{k+1} = y_k + h_k, with the last knot
//! set to exactly B. All-zero parameters give the identity map.
//!
//! **Interval** (`circular = false`), `n_params = 3K - 1`: the K - 1 interior knot
//! slopes δ_1..δ_{K-1} are learnable; the boundary slopes δ_0 = δ_K = 1 are fixed, so the
//! map is the identity outside [-B, B] and C¹ everywhere (the unconstrained spline of
//! the paper with linear tails).
//!
//! **Circular** (`circular = true`), `n_params = 3K`: K learnable slopes δ_0..δ_{K-1} and
//! δ_K = δ_0, so the map is a C¹ diffeomorphism of the circle [-B, B) with -B ≡ B that
//! fixes the point -B. Inputs outside [-B, B) are first wrapped into it (x - 2B n), and
//! outputs are returned in [-B, B) too (a value that rounds to B is returned as -B).
//!
//! In bin k with ξ = (x - x_k)/w_k ∈ [0, 1], s = h_k/w_k, D = δ_{k+1} + δ_k - 2s:
//!
//! - y = y_k + h_k [s ξ² + δ_k ξ(1-ξ)] / [s + D ξ(1-ξ)];
//! - ln dy/dx = 2 ln s + ln[δ_{k+1} ξ² + 2 s ξ(1-ξ) + δ_k (1-ξ)²] - 2 ln[s + D ξ(1-ξ)];
//! - inverse: with v = (y - y_k)/h_k, ξ solves a ξ² + b ξ + c = 0 for a = s - δ_k + v D,
//!   b = δ_k - v D, c = -s v; the root in [0, 1] is ξ = -2c / (b + √(b² - 4ac)), whose
//!   denominator is positive for every admissible bin.
//!
//! Bins are found by binary search on the knots. ξ is clamped to [0, 1] so rounding at
//! a knot never leaves the bin. The per-element functions keep their scratch (at most
//! 64 bins) on the stack and never allocate; they require `shape.validate()` to hold
//! and `theta.len() >= shape.n_params()` (a violation is a bug in the caller and
//! panics on indexing). The `*_rows` helpers check both and return a [`FlowError`].

use crate::real::Real;
use crate::FlowError;

/// Minimum bin width and height, as a fraction of the range 2B.
pub const MIN_BIN: f64 = 1e-3;
/// Minimum knot slope.
pub const MIN_SLOPE: f64 = 1e-3;
/// Largest number of bins (the per-element scratch lives on the stack).
pub const MAX_BINS: usize = 64;

/// Shape of a spline: K bins on [-bound, bound].
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct SplineShape {
    /// Number of bins K (2 to 64).
    pub bins: usize,
    /// Half-width B of the spline's range [-B, B].
    pub bound: f64,
    /// Whether [-B, B) is a circle (-B identified with B).
    pub circular: bool,
}

impl SplineShape {
    /// Unconstrained numbers per transformed scalar: 3K - 1 for the interval spline
    /// (K widths, K heights, K - 1 interior knot slopes), 3K for the circular one
    /// (K widths, K heights, K knot slopes, the last knot sharing the first's).
    pub fn n_params(&self) -> usize {
        2 * self.bins + self.n_slopes()
    }

    /// Number of learnable knot slopes.
    fn n_slopes(&self) -> usize {
        if self.circular {
            self.bins
        } else {
            self.bins - 1
        }
    }

    /// Checks 2 <= bins <= 64 and a finite positive bound.
    pub fn validate(&self) -> Result<(), String> {
        if !(2..=MAX_BINS).contains(&self.bins) {
            return Err(format!(
                "spline bins must be between 2 and {MAX_BINS}, got {}",
                self.bins
            ));
        }
        if !(self.bound.is_finite() && self.bound > 0.0) {
            return Err(format!(
                "spline bound must be finite and positive, got {}",
                self.bound
            ));
        }
        Ok(())
    }

    /// Index in `theta` of the raw slope of knot `i` (0..=K), or `None` for the fixed
    /// boundary knots of the interval spline.
    fn slope_index(&self, i: usize) -> Option<usize> {
        let k = self.bins;
        if self.circular {
            Some(2 * k + i % k)
        } else if i == 0 || i == k {
            None
        } else {
            Some(2 * k + i - 1)
        }
    }
}

/// The shift c in δ = MIN_SLOPE + softplus(r + c) that makes r = 0 give δ = 1.
fn slope_shift() -> f64 {
    (1.0 - MIN_SLOPE).exp_m1().ln()
}

/// ln(1 + e^z), without overflow.
#[inline(always)]
fn softplus<T: Real>(z: T) -> T {
    z.max(T::zero()) + (-z.abs()).fexp().ln_1p()
}

/// 1 / (1 + e^-z), the derivative of softplus.
#[inline(always)]
fn sigmoid<T: Real>(z: T) -> T {
    T::one() / (T::one() + (-z).fexp())
}

/// Knot slope of knot `i` (0..=K).
#[inline(always)]
fn knot_slope<T: Real>(shape: &SplineShape, theta: &[T], i: usize) -> T {
    match shape.slope_index(i) {
        Some(j) => T::of(MIN_SLOPE) + softplus(theta[j] + T::of(slope_shift())),
        None => T::one(),
    }
}

/// Wraps `v` into [-b, b) (NaN and infinities give NaN).
#[inline(always)]
fn wrap<T: Real>(v: T, b: T) -> T {
    let period = b + b;
    let mut r = v - period * ((v + b) / period).floor();
    if r < -b {
        r += period;
    }
    if r >= b {
        r -= period;
    }
    if r < -b {
        // Reachable only by rounding right at the seam.
        r = -b;
    }
    r
}

/// `v` clamped to [0, 1] (NaN stays NaN).
#[inline(always)]
fn unit_clamp<T: Real>(v: T) -> T {
    if v < T::zero() {
        T::zero()
    } else if v > T::one() {
        T::one()
    } else {
        v
    }
}

/// The softmax probabilities of widths and heights and the knots, on the stack.
struct Knots<T> {
    pw: [T; MAX_BINS],
    ph: [T; MAX_BINS],
    xs: [T; MAX_BINS + 1],
    ys: [T; MAX_BINS + 1],
}

impl<T: Real> Knots<T> {
    fn new(shape: &SplineShape, theta: &[T]) -> Self {
        let k = shape.bins;
        let mut kn = Knots {
            pw: [T::zero(); MAX_BINS],
            ph: [T::zero(); MAX_BINS],
            xs: [T::zero(); MAX_BINS + 1],
            ys: [T::zero(); MAX_BINS + 1],
        };
        softmax(&theta[..k], &mut kn.pw[..k]);
        softmax(&theta[k..2 * k], &mut kn.ph[..k]);
        cumulate(shape, &kn.pw[..k], &mut kn.xs[..=k]);
        cumulate(shape, &kn.ph[..k], &mut kn.ys[..=k]);
        kn
    }

    /// The bin of `x` in [-B, B] (the last bin for x = B).
    fn bin_of_x(&self, k: usize, x: T) -> usize {
        self.xs[1..k].partition_point(|&v| v <= x)
    }

    /// The bin of `y` in [-B, B].
    fn bin_of_y(&self, k: usize, y: T) -> usize {
        self.ys[1..k].partition_point(|&v| v <= y)
    }

    /// The rational-quadratic piece of bin `bin`.
    fn piece(&self, shape: &SplineShape, theta: &[T], bin: usize) -> Piece<T> {
        Piece {
            x0: self.xs[bin],
            w: self.xs[bin + 1] - self.xs[bin],
            y0: self.ys[bin],
            h: self.ys[bin + 1] - self.ys[bin],
            d0: knot_slope(shape, theta, bin),
            d1: knot_slope(shape, theta, bin + 1),
        }
    }
}

/// `p = softmax(raw)`.
fn softmax<T: Real>(raw: &[T], p: &mut [T]) {
    let top = raw.iter().fold(T::neg_infinity(), |m, &v| m.max(v));
    let mut sum = T::zero();
    for (pv, &r) in p.iter_mut().zip(raw) {
        *pv = (r - top).fexp();
        sum += *pv;
    }
    let inv = T::one() / sum;
    for pv in p.iter_mut() {
        *pv *= inv;
    }
}

/// Knots -B, -B + size_0, ..., B from the probabilities `p` (size_j = 2B(m + (1-Km) p_j)).
fn cumulate<T: Real>(shape: &SplineShape, p: &[T], knots: &mut [T]) {
    let k = shape.bins;
    let b = T::of(shape.bound);
    let floor = T::of(2.0 * shape.bound * MIN_BIN);
    let scale = T::of(2.0 * shape.bound * (1.0 - k as f64 * MIN_BIN));
    knots[0] = -b;
    for j in 0..k - 1 {
        knots[j + 1] = knots[j] + floor + scale * p[j];
    }
    knots[k] = b;
}

/// One bin's rational-quadratic piece: left knot (x0, y0), width, height, knot slopes.
#[derive(Clone, Copy)]
struct Piece<T> {
    x0: T,
    w: T,
    y0: T,
    h: T,
    d0: T,
    d1: T,
}

/// Gradient of a loss with respect to a piece's quantities and the input x.
struct PieceGrad<T> {
    x: T,
    x0: T,
    w: T,
    y0: T,
    h: T,
    d0: T,
    d1: T,
}

impl<T: Real> Piece<T> {
    /// ξ of input x, clamped to [0, 1].
    #[inline(always)]
    fn xi_of(&self, x: T) -> T {
        unit_clamp((x - self.x0) / self.w)
    }

    /// (y, ln dy/dx) at ξ.
    #[inline(always)]
    fn eval(&self, xi: T) -> (T, T) {
        let two = T::one() + T::one();
        let s = self.h / self.w;
        let om = T::one() - xi;
        let t = xi * om;
        let den = s + (self.d1 + self.d0 - two * s) * t;
        let num = s * xi * xi + self.d0 * t;
        let dn = self.d1 * xi * xi + two * s * t + self.d0 * om * om;
        let y = self.y0 + self.h * (num / den);
        let ld = two * s.ln() + dn.ln() - two * den.ln();
        (y, ld)
    }

    /// ξ with y = piece(ξ), from the stable root of the quadratic, clamped to [0, 1].
    #[inline(always)]
    fn solve(&self, y: T) -> T {
        let two = T::one() + T::one();
        let s = self.h / self.w;
        let dsum = self.d1 + self.d0 - two * s;
        let v = unit_clamp((y - self.y0) / self.h);
        let a = s - self.d0 + v * dsum;
        let b = self.d0 - v * dsum;
        let c = -s * v;
        let disc = (b * b - two * two * a * c).max(T::zero());
        let denom = (b + disc.sqrt()).max(T::min_positive_value());
        unit_clamp(-(c + c) / denom)
    }

    /// Reverse-mode gradient of gy y + gl ln dy/dx at ξ with respect to x and the
    /// piece's quantities.
    #[inline(always)]
    fn grad(&self, xi: T, gy: T, gl: T) -> PieceGrad<T> {
        let one = T::one();
        let two = one + one;
        let (d0, d1, h, w) = (self.d0, self.d1, self.h, self.w);
        let s = h / w;
        let om = one - xi;
        let t = xi * om;
        let dt = one - two * xi; // dt/dξ
        let dsum = d1 + d0 - two * s;
        let num = s * xi * xi + d0 * t;
        let den = s + dsum * t;
        let dn = d1 * xi * xi + two * s * t + d0 * om * om;
        let r = num / den;
        // y = y0 + h num/den; ld = 2 ln s + ln dn - 2 ln den.
        let g_num = gy * h / den;
        let g_den = -(gy * h * r + two * gl) / den;
        let g_dn = gl / dn;
        let g_xi = g_num * (two * s * xi + d0 * dt)
            + g_den * dsum * dt
            + g_dn * two * (d1 * xi + s * dt - d0 * om);
        let g_s = g_num * xi * xi + g_den * (one - two * t) + g_dn * two * t + two * gl / s;
        // ξ = (x - x0)/w, s = h/w.
        let g_x = g_xi / w;
        PieceGrad {
            x: g_x,
            x0: -g_x,
            w: -(g_xi * xi + g_s * s) / w,
            y0: gy,
            h: gy * r + g_s / w,
            d0: (g_num + g_den) * t + g_dn * om * om,
            d1: g_den * t + g_dn * xi * xi,
        }
    }
}

/// Adds to `out` (the raw softmax values) the gradient of a loss that depends on the
/// sizes through one bin `bin`: `g_own` on its size and `g_left` on its left knot (the
/// sum of the sizes before it). size_j = 2B(m + (1-Km) p_j), p = softmax(raw).
fn softmax_backward<T: Real>(
    shape: &SplineShape,
    p: &[T],
    bin: usize,
    g_own: T,
    g_left: T,
    out: &mut [T],
) {
    let scale = T::of(2.0 * shape.bound * (1.0 - shape.bins as f64 * MIN_BIN));
    let left: T = p[..bin].iter().fold(T::zero(), |a, &v| a + v);
    let mean = scale * (g_own * p[bin] + g_left * left);
    for (j, (o, &pj)) in out.iter_mut().zip(p).enumerate() {
        let gj = if j < bin {
            scale * g_left
        } else if j == bin {
            scale * g_own
        } else {
            T::zero()
        };
        *o += pj * (gj - mean);
    }
}

/// Adds a piece's gradient to the raw parameters' gradient `g_theta`.
fn scatter<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    kn: &Knots<T>,
    bin: usize,
    pg: &PieceGrad<T>,
    g_theta: &mut [T],
) {
    let k = shape.bins;
    softmax_backward(shape, &kn.pw[..k], bin, pg.w, pg.x0, &mut g_theta[..k]);
    softmax_backward(shape, &kn.ph[..k], bin, pg.h, pg.y0, &mut g_theta[k..2 * k]);
    let c = T::of(slope_shift());
    for (knot, g) in [(bin, pg.d0), (bin + 1, pg.d1)] {
        if let Some(j) = shape.slope_index(knot) {
            g_theta[j] += g * sigmoid(theta[j] + c);
        }
    }
}

/// The input as the spline sees it: wrapped onto the circle, or `None` outside the
/// interval spline's range (where the map is the identity).
#[inline(always)]
fn domain<T: Real>(shape: &SplineShape, v: T) -> Option<T> {
    let b = T::of(shape.bound);
    if shape.circular {
        Some(wrap(v, b))
    } else if v >= -b && v <= b {
        Some(v)
    } else {
        None
    }
}

/// The output as returned: wrapped into [-B, B) for the circular spline.
#[inline(always)]
fn range<T: Real>(shape: &SplineShape, v: T) -> T {
    if shape.circular {
        wrap(v, T::of(shape.bound))
    } else {
        v
    }
}

/// y = g(x), returns (y, ln dy/dx).
pub fn forward<T: Real>(shape: &SplineShape, theta: &[T], x: T) -> (T, T) {
    let Some(x) = domain(shape, x) else {
        return (x, T::zero());
    };
    let kn = Knots::new(shape, theta);
    let piece = kn.piece(shape, theta, kn.bin_of_x(shape.bins, x));
    let (y, ld) = piece.eval(piece.xi_of(x));
    (range(shape, y), ld)
}

/// x = g^-1(y), returns (x, ln dx/dy) (= minus the forward log-derivative at x).
pub fn inverse<T: Real>(shape: &SplineShape, theta: &[T], y: T) -> (T, T) {
    let Some(y) = domain(shape, y) else {
        return (y, T::zero());
    };
    let kn = Knots::new(shape, theta);
    let piece = kn.piece(shape, theta, kn.bin_of_y(shape.bins, y));
    let xi = piece.solve(y);
    let (_, ld) = piece.eval(xi);
    (range(shape, piece.x0 + xi * piece.w), -ld)
}

/// Reverse-mode gradient of the forward map: given gy = dL/dy and gl = dL/d(ln dy/dx),
/// ADD dL/dtheta into g_theta (len n_params) and return dL/dx.
pub fn forward_backward<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    x: T,
    gy: T,
    gl: T,
    g_theta: &mut [T],
) -> T {
    let Some(x) = domain(shape, x) else {
        return gy;
    };
    let kn = Knots::new(shape, theta);
    let bin = kn.bin_of_x(shape.bins, x);
    let piece = kn.piece(shape, theta, bin);
    let pg = piece.grad(piece.xi_of(x), gy, gl);
    scatter(shape, theta, &kn, bin, &pg, g_theta);
    pg.x
}

/// Same for the inverse map: given gx = dL/dx and gl = dL/d(ln dx/dy) at input y, ADD
/// into g_theta, return dL/dy.
///
/// With x = g^-1(y; θ) and ln dx/dy = -ld(x; θ): the total gradient reaching x is
/// G = gx - gl ∂ld/∂x; then dL/dy = G / g'(x) and dL/dθ = -gl ∂ld/∂θ - (G/g') ∂g/∂θ
/// (implicit differentiation of y = g(x; θ)).
pub fn inverse_backward<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    y: T,
    gx: T,
    gl: T,
    g_theta: &mut [T],
) -> T {
    let Some(y) = domain(shape, y) else {
        return gx;
    };
    let kn = Knots::new(shape, theta);
    let bin = kn.bin_of_y(shape.bins, y);
    let piece = kn.piece(shape, theta, bin);
    let xi = piece.solve(y);
    let dld_dx = piece.grad(xi, T::zero(), T::one()).x;
    let dy_dx = piece.grad(xi, T::one(), T::zero()).x;
    let g_total = gx - gl * dld_dx;
    let g_y = g_total / dy_dx;
    let pg = piece.grad(xi, -g_y, -gl);
    scatter(shape, theta, &kn, bin, &pg, g_theta);
    g_y
}

/// Checks a shape and the lengths of a batch of `n` rows (`theta` n x n_params).
fn check_rows<T>(shape: &SplineShape, theta: &[T], n: usize) -> Result<(), FlowError> {
    shape.validate().map_err(FlowError::Spec)?;
    let np = shape.n_params();
    if theta.len() != n * np {
        return Err(FlowError::Shape {
            what: "spline parameters",
            expected: n * np,
            got: theta.len(),
        });
    }
    Ok(())
}

/// Checks that a per-row slice has `n` values.
fn check_len<T>(what: &'static str, v: &[T], n: usize) -> Result<(), FlowError> {
    if v.len() != n {
        return Err(FlowError::Shape {
            what,
            expected: n,
            got: v.len(),
        });
    }
    Ok(())
}

/// Batched [`forward`]: `x` (n values) is replaced by y in place, `log_det[i]` is set
/// to ln dy_i/dx_i; row i of `theta` (n x n_params, row-major) parametrises element i.
pub fn forward_rows<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    x: &mut [T],
    log_det: &mut [T],
) -> Result<(), FlowError> {
    rows_map(shape, theta, x, log_det, forward::<T>)
}

/// Batched [`inverse`]: `y` (n values) is replaced by x in place, `log_det[i]` is set
/// to ln dx_i/dy_i.
pub fn inverse_rows<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    y: &mut [T],
    log_det: &mut [T],
) -> Result<(), FlowError> {
    rows_map(shape, theta, y, log_det, inverse::<T>)
}

/// Shared body of the batched maps: each value through `element` with its own row of
/// `theta`, in place, its log-derivative into `log_det`.
fn rows_map<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    v: &mut [T],
    log_det: &mut [T],
    element: fn(&SplineShape, &[T], T) -> (T, T),
) -> Result<(), FlowError> {
    let n = v.len();
    check_rows(shape, theta, n)?;
    check_len("spline log-derivatives", log_det, n)?;
    let np = shape.n_params();
    for ((v, ld), th) in v
        .iter_mut()
        .zip(log_det.iter_mut())
        .zip(theta.chunks_exact(np))
    {
        (*v, *ld) = element(shape, th, *v);
    }
    Ok(())
}

/// Batched [`forward_backward`] at the pre-transform inputs `x` (n values) with
/// gradients `gy` and `gl` (n each): `g_theta` (n x n_params) and `g_x` (n) are
/// overwritten with dL/dtheta and dL/dx.
pub fn forward_rows_backward<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    x: &[T],
    gy: &[T],
    gl: &[T],
    g_theta: &mut [T],
    g_x: &mut [T],
) -> Result<(), FlowError> {
    rows_backward(shape, theta, x, gy, gl, g_theta, g_x, forward_backward::<T>)
}

/// Batched [`inverse_backward`] at the pre-transform inputs `y` (n values) with
/// gradients `gx` and `gl` (n each): `g_theta` (n x n_params) and `g_y` (n) are
/// overwritten with dL/dtheta and dL/dy.
pub fn inverse_rows_backward<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    y: &[T],
    gx: &[T],
    gl: &[T],
    g_theta: &mut [T],
    g_y: &mut [T],
) -> Result<(), FlowError> {
    rows_backward(shape, theta, y, gx, gl, g_theta, g_y, inverse_backward::<T>)
}

/// The element-wise backward function of one direction.
type ElementBackward<T> = fn(&SplineShape, &[T], T, T, T, &mut [T]) -> T;

/// Shared body of the batched backward passes.
#[allow(clippy::too_many_arguments)]
fn rows_backward<T: Real>(
    shape: &SplineShape,
    theta: &[T],
    input: &[T],
    g_out: &[T],
    gl: &[T],
    g_theta: &mut [T],
    g_in: &mut [T],
    element: ElementBackward<T>,
) -> Result<(), FlowError> {
    let n = input.len();
    check_rows(shape, theta, n)?;
    check_len("spline output gradients", g_out, n)?;
    check_len("spline log-derivative gradients", gl, n)?;
    check_len("spline input gradients", g_in, n)?;
    check_len("spline parameter gradients", g_theta, theta.len())?;
    let np = shape.n_params();
    g_theta.fill(T::zero());
    for (i, (th, gth)) in theta
        .chunks_exact(np)
        .zip(g_theta.chunks_exact_mut(np))
        .enumerate()
    {
        g_in[i] = element(shape, th, input[i], g_out[i], gl[i], gth);
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    //! Checks against exact identities (zero parameters, knot interpolation, inverse,
    //! periodicity) and central finite differences, never against this module's own
    //! intermediate quantities: the reference knots and slopes are recomputed here
    //! from the formulas in the module documentation.
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Interval and circular shapes, including the smallest bin count.
    fn shapes() -> [SplineShape; 4] {
        [
            SplineShape {
                bins: 8,
                bound: 3.0,
                circular: false,
            },
            SplineShape {
                bins: 2,
                bound: 1.0,
                circular: false,
            },
            SplineShape {
                bins: 8,
                bound: std::f64::consts::PI,
                circular: true,
            },
            SplineShape {
                bins: 5,
                bound: 2.0,
                circular: true,
            },
        ]
    }

    fn random_theta(shape: &SplineShape, scale: f64, rng: &mut ChaCha8Rng) -> Vec<f64> {
        (0..shape.n_params())
            .map(|_| scale * (2.0 * rng.gen::<f64>() - 1.0))
            .collect()
    }

    /// Knots (x, y) and knot slopes recomputed from the documented formulas.
    fn reference_knots(shape: &SplineShape, theta: &[f64]) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let k = shape.bins;
        let b = shape.bound;
        let knots = |raw: &[f64]| {
            let z: f64 = raw.iter().map(|r| r.exp()).sum();
            let mut out = vec![-b];
            for r in raw {
                let size = 2.0 * b * (1e-3 + (1.0 - k as f64 * 1e-3) * r.exp() / z);
                out.push(out.last().unwrap() + size);
            }
            out
        };
        let slope = |r: f64| 1e-3 + (1.0 + (r + (0.999f64.exp() - 1.0).ln()).exp()).ln();
        let deltas: Vec<f64> = (0..=k)
            .map(|i| {
                if shape.circular {
                    slope(theta[2 * k + i % k])
                } else if i == 0 || i == k {
                    1.0
                } else {
                    slope(theta[2 * k + i - 1])
                }
            })
            .collect();
        (knots(&theta[..k]), knots(&theta[k..2 * k]), deltas)
    }

    /// `v` wrapped into [-b, b), recomputed here.
    fn modulo(v: f64, b: f64) -> f64 {
        (v + b).rem_euclid(2.0 * b) - b
    }

    /// Distance on the circle of circumference 2b.
    fn circle_distance(a: f64, c: f64, b: f64) -> f64 {
        let d = (a - c).rem_euclid(2.0 * b);
        d.min(2.0 * b - d)
    }

    /// Fourth-order central difference of f at x with step h.
    fn five_point(f: impl Fn(f64) -> f64, x: f64, h: f64) -> f64 {
        (f(x - 2.0 * h) - 8.0 * f(x - h) + 8.0 * f(x + h) - f(x + 2.0 * h)) / (12.0 * h)
    }

    #[test]
    fn shape_validation_and_parameter_counts() {
        let ok = SplineShape {
            bins: 8,
            bound: 3.0,
            circular: false,
        };
        assert!(ok.validate().is_ok());
        assert_eq!(ok.n_params(), 23);
        assert_eq!(
            SplineShape {
                circular: true,
                ..ok
            }
            .n_params(),
            24
        );
        for bad in [
            SplineShape { bins: 1, ..ok },
            SplineShape { bins: 65, ..ok },
            SplineShape { bound: 0.0, ..ok },
            SplineShape {
                bound: f64::NAN,
                ..ok
            },
            SplineShape {
                bound: f64::INFINITY,
                ..ok
            },
        ] {
            assert!(bad.validate().is_err(), "{bad:?}");
        }
    }

    #[test]
    fn zero_parameters_give_the_identity() {
        for shape in shapes() {
            let b = shape.bound;
            let theta = vec![0.0f64; shape.n_params()];
            let theta32 = vec![0.0f32; shape.n_params()];
            for i in 0..=400 {
                let x = -1.5 * b + 3.0 * b * i as f64 / 400.0;
                let want = if shape.circular { modulo(x, b) } else { x };
                let (y, ld) = forward(&shape, &theta, x);
                let (xi, li) = inverse(&shape, &theta, x);
                let (y32, ld32) = forward(&shape, &theta32, x as f32);
                if shape.circular {
                    assert!(circle_distance(y, want, b) < 1e-12, "{shape:?} x={x} y={y}");
                    assert!(circle_distance(xi, want, b) < 1e-12, "{shape:?} y={x}");
                    assert!(circle_distance(y32 as f64, want, b) < 2e-6);
                } else {
                    assert!((y - want).abs() < 1e-12, "{shape:?} x={x} y={y}");
                    assert!((xi - want).abs() < 1e-12, "{shape:?} y={x}");
                    assert!((y32 as f64 - want).abs() < 2e-6);
                }
                assert!(ld.abs() < 1e-12 && li.abs() < 1e-12 && ld32.abs() < 1e-6);
            }
        }
    }

    /// The spline passes through its knots with the knot slopes as derivatives.
    #[test]
    fn spline_interpolates_its_knots_and_slopes() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        for shape in shapes() {
            for _ in 0..5 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                let (xs, ys, deltas) = reference_knots(&shape, &theta);
                for i in 0..shape.bins {
                    let (y, ld) = forward(&shape, &theta, xs[i]);
                    assert!(
                        (y - ys[i]).abs() < 1e-12,
                        "{shape:?} knot {i}: {y} vs {}",
                        ys[i]
                    );
                    assert!((ld - deltas[i].ln()).abs() < 1e-10, "{shape:?} knot {i}");
                }
            }
        }
    }

    #[test]
    fn log_derivative_matches_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let h = 1e-4;
        let mut worst = 0.0f64;
        let mut checked = 0;
        for shape in shapes() {
            let b = shape.bound;
            for _ in 0..10 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                let (xs, _, _) = reference_knots(&shape, &theta);
                for _ in 0..200 {
                    let x = b * (3.0 * rng.gen::<f64>() - 1.5);
                    let xw = if shape.circular { modulo(x, b) } else { x };
                    if xs.iter().any(|k| (xw - k).abs() < 3.0 * h) {
                        continue;
                    }
                    let fd = five_point(|v| forward(&shape, &theta, v).0, x, h);
                    let ld = forward(&shape, &theta, x).1;
                    let err = (ld - fd.ln()).abs();
                    worst = worst.max(err);
                    checked += 1;
                    assert!(err < 1e-7, "{shape:?} x={x}: ld {ld} vs ln fd {}", fd.ln());
                }
            }
        }
        assert!(checked > 7000, "only {checked} points checked");
        eprintln!("log-derivative vs finite differences: worst {worst:.2e} over {checked}");
    }

    /// Tolerances of an f32 inverse whose exact answer is x: x to 1e-5 (relative
    /// above 1) times the condition number max(1, 0.1/g'(x)), since in a flat stretch
    /// one rounding of y moves x by ulp(y)/g'; the log-derivative to 1e-5 (relative
    /// above 1) plus |d ln g'/dx| (a central difference) times that x tolerance and 4
    /// ulp of B for the rounding of the knots and of the returned point.
    fn inverse_tolerances(shape: &SplineShape, theta: &[f64], x: f64) -> (f64, f64) {
        let (_, ld) = forward(shape, theta, x);
        let tol_x = 1e-5 * x.abs().max(1.0) * (0.1 / ld.exp()).max(1.0);
        let tol_l = 1e-5 * ld.abs().max(1.0)
            + ld_slope(shape, theta, x).abs() * (tol_x + 4.0 * f32::EPSILON as f64 * shape.bound);
        (tol_x, tol_l)
    }

    /// d ln g'/dx by a central difference (step 1e-6).
    fn ld_slope(shape: &SplineShape, theta: &[f64], x: f64) -> f64 {
        let h = 1e-6;
        (forward(shape, theta, x + h).1 - forward(shape, theta, x - h).1) / (2.0 * h)
    }

    #[test]
    fn inverse_undoes_forward_in_f64_and_f32() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (mut worst64, mut worst32, mut worst_ld32) = (0.0f64, 0.0f64, 0.0f64);
        let mut strict = 0;
        for shape in shapes() {
            let b = shape.bound;
            for _ in 0..10 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                let theta32: Vec<f32> = theta.iter().map(|&v| v as f32).collect();
                for _ in 0..500 {
                    let x = b * (3.0 * rng.gen::<f64>() - 1.5);
                    let want = if shape.circular { modulo(x, b) } else { x };
                    let (y, ld) = forward(&shape, &theta, x);
                    let (back, li) = inverse(&shape, &theta, y);
                    let err = if shape.circular {
                        circle_distance(back, want, b)
                    } else {
                        (back - want).abs()
                    };
                    worst64 = worst64.max(err);
                    assert!(err < 1e-10, "{shape:?} x={x} back={back}");
                    assert!((ld + li).abs() < 1e-10, "{shape:?} x={x}: {ld} {li}");
                    // And forward undoes inverse.
                    let (again, _) = forward(&shape, &theta, back);
                    assert!(circle_distance(again, y, 2.0 * b) < 1e-10);

                    let (y32, ld32) = forward(&shape, &theta32, x as f32);
                    let (back32, li32) = inverse(&shape, &theta32, y32);
                    let err32 = if shape.circular {
                        circle_distance(back32 as f64, want, b)
                    } else {
                        (back32 as f64 - want).abs()
                    };
                    let (tol_x, tol_l) = inverse_tolerances(&shape, &theta, want);
                    if tol_x <= 1e-5 * want.abs().max(1.0) {
                        worst32 = worst32.max(err32);
                        strict += 1;
                    }
                    worst_ld32 = worst_ld32.max((ld32 + li32).abs() as f64 / tol_l);
                    assert!(err32 < tol_x, "{shape:?} x={x} back32={back32}");
                    assert!(((ld32 + li32) as f64).abs() < tol_l, "{shape:?} x={x}");
                }
            }
        }
        assert!(
            strict > 15_000,
            "only {strict} of 20000 points had slope >= 0.1"
        );
        eprintln!(
            "round trip: f64 {worst64:.2e}, f32 {worst32:.2e} at {strict} points with slope >= 0.1 \
             (log-dets: worst {worst_ld32:.2} of the tolerance)"
        );
    }

    #[test]
    fn forward_is_strictly_increasing() {
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        for shape in shapes() {
            let b = shape.bound;
            let (lo, hi) = if shape.circular {
                (-b, b)
            } else {
                (-1.5 * b, 1.5 * b)
            };
            for _ in 0..5 {
                let theta = random_theta(&shape, 3.0, &mut rng);
                let n = 20_000;
                let mut prev = f64::NEG_INFINITY;
                for i in 0..n {
                    let x = lo + (hi - lo) * i as f64 / n as f64;
                    let y = forward(&shape, &theta, x).0;
                    assert!(y > prev, "{shape:?} not increasing at x={x}: {prev} -> {y}");
                    prev = y;
                }
            }
        }
    }

    #[test]
    fn circular_spline_is_a_smooth_map_of_the_circle() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        for shape in shapes().into_iter().filter(|s| s.circular) {
            let b = shape.bound;
            for _ in 0..10 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                // The seam point is fixed, and the image stays in [-B, B).
                assert_eq!(forward(&shape, &theta, -b).0, -b);
                let tiny = 1e-9;
                let (top, ld_top) = forward(&shape, &theta, b - tiny);
                let (bottom, ld_bottom) = forward(&shape, &theta, -b + tiny);
                let ld_seam = forward(&shape, &theta, -b).1;
                assert!(top < b && top > b - 1e-6, "g(B-) = {top}");
                // Continuity and equal derivatives across the seam.
                assert!(circle_distance(top, bottom, b) < 1e-6);
                assert!((ld_top - ld_seam).abs() < 1e-6 && (ld_bottom - ld_seam).abs() < 1e-6);
                for _ in 0..200 {
                    let x = b * (2.0 * rng.gen::<f64>() - 1.0);
                    let (y, ld) = forward(&shape, &theta, x);
                    assert!((-b..b).contains(&y), "{y} outside [-B, B)");
                    for turns in [-3.0, -1.0, 1.0, 2.0] {
                        let (ys, lds) = forward(&shape, &theta, x + turns * 2.0 * b);
                        assert!(circle_distance(ys, y, b) < 1e-12, "x={x} turns={turns}");
                        assert!((lds - ld).abs() < 1e-9);
                    }
                    let (xb, _) = inverse(&shape, &theta, y + 2.0 * b);
                    assert!(circle_distance(xb, x, b) < 1e-10);
                }
            }
        }
    }

    /// Inputs away from knots (whose moves under a parameter step would change bin):
    /// the middle 80% of random bins, plus points outside the range.
    fn probe_points(shape: &SplineShape, knots: &[f64], rng: &mut ChaCha8Rng) -> Vec<f64> {
        let b = shape.bound;
        let mut pts: Vec<f64> = (0..12)
            .map(|_| {
                let k = rng.gen_range(0..shape.bins);
                knots[k] + (knots[k + 1] - knots[k]) * (0.1 + 0.8 * rng.gen::<f64>())
            })
            .collect();
        // Outside the range: the identity tails, or wrapped angles.
        pts.push(1.3 * b + 0.1 * rng.gen::<f64>());
        pts.push(-1.7 * b - 0.1 * rng.gen::<f64>());
        if shape.circular {
            pts.retain(|&x| {
                let w = modulo(x, b);
                knots
                    .iter()
                    .all(|k| (w - k).abs() > 0.02 * (knots[1] - knots[0]).min(0.1))
            });
        }
        pts
    }

    /// Largest |analytic - fd| over the largest |analytic| for one loss.
    fn gradient_error(
        shape: &SplineShape,
        theta: &[f64],
        input: f64,
        loss: impl Fn(&[f64], f64) -> f64,
        backward: impl Fn(&[f64], f64, &mut [f64]) -> f64,
    ) -> f64 {
        let h = 2e-5;
        let np = shape.n_params();
        let offset = 0.5;
        let mut g = vec![offset; np];
        let g_in = backward(theta, input, &mut g);
        let mut analytic: Vec<f64> = g.iter().map(|v| v - offset).collect();
        analytic.push(g_in);
        let mut fd = Vec::with_capacity(np + 1);
        for j in 0..np {
            fd.push(five_point(
                |v| {
                    let mut t = theta.to_vec();
                    t[j] = v;
                    loss(&t, input)
                },
                theta[j],
                h,
            ));
        }
        fd.push(five_point(|v| loss(theta, v), input, h));
        let scale = analytic.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let diff = analytic
            .iter()
            .zip(&fd)
            .fold(0.0f64, |m, (a, f)| m.max((a - f).abs()));
        diff / scale.max(1e-300)
    }

    #[test]
    fn forward_gradients_match_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(6);
        let mut worst = 0.0f64;
        for shape in shapes() {
            for _ in 0..6 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                let (xs, _, _) = reference_knots(&shape, &theta);
                for x in probe_points(&shape, &xs, &mut rng) {
                    let (gy, gl) = (rng.gen::<f64>() - 0.5, rng.gen::<f64>() - 0.5);
                    let loss = |t: &[f64], v: f64| {
                        let (y, ld) = forward(&shape, t, v);
                        gy * y + gl * ld
                    };
                    let back = |t: &[f64], v: f64, g: &mut [f64]| {
                        forward_backward(&shape, t, v, gy, gl, g)
                    };
                    let err = gradient_error(&shape, &theta, x, loss, back);
                    worst = worst.max(err);
                    assert!(err < 1e-6, "{shape:?} x={x}: relative error {err:.2e}");
                }
            }
        }
        eprintln!("forward gradients: worst relative error {worst:.2e}");
    }

    #[test]
    fn inverse_gradients_match_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let mut worst = 0.0f64;
        for shape in shapes() {
            for _ in 0..6 {
                let theta = random_theta(&shape, 2.0, &mut rng);
                let (_, ys, _) = reference_knots(&shape, &theta);
                for y in probe_points(&shape, &ys, &mut rng) {
                    let (gx, gl) = (rng.gen::<f64>() - 0.5, rng.gen::<f64>() - 0.5);
                    let loss = |t: &[f64], v: f64| {
                        let (x, ld) = inverse(&shape, t, v);
                        gx * x + gl * ld
                    };
                    let back = |t: &[f64], v: f64, g: &mut [f64]| {
                        inverse_backward(&shape, t, v, gx, gl, g)
                    };
                    let err = gradient_error(&shape, &theta, y, loss, back);
                    worst = worst.max(err);
                    assert!(err < 1e-6, "{shape:?} y={y}: relative error {err:.2e}");
                }
            }
        }
        eprintln!("inverse gradients: worst relative error {worst:.2e}");
    }

    #[test]
    fn single_and_double_precision_agree() {
        let mut rng = ChaCha8Rng::seed_from_u64(8);
        let (mut worst_fwd, mut worst_inv) = (0.0f64, 0.0f64);
        for shape in shapes() {
            let b = shape.bound;
            let dist = |a: f64, c: f64| {
                if shape.circular {
                    circle_distance(a, c, b)
                } else {
                    (a - c).abs()
                }
            };
            for _ in 0..10 {
                // Parameters exactly representable in both precisions.
                let theta32: Vec<f32> = random_theta(&shape, 2.0, &mut rng)
                    .iter()
                    .map(|&v| v as f32)
                    .collect();
                let theta: Vec<f64> = theta32.iter().map(|&v| v as f64).collect();
                for _ in 0..300 {
                    let v = (b * (3.0 * rng.gen::<f64>() - 1.5)) as f32;
                    let (y, ld) = forward(&shape, &theta, v as f64);
                    let (y32, ld32) = forward(&shape, &theta32, v);
                    // The f32 knots are good to a few ulp of B, which moves y by g'
                    // times that and ln g' by |d ln g'/dx| times that.
                    let knot_error = 4.0 * f32::EPSILON as f64 * b;
                    let slope_term = ld.exp() * knot_error / 1e-5;
                    let curve_term = ld_slope(&shape, &theta, v as f64).abs() * knot_error / 1e-5;
                    let errs = [
                        dist(y32 as f64, y) / (y.abs().max(1.0) + slope_term),
                        (ld32 as f64 - ld).abs() / (ld.abs().max(1.0) + curve_term),
                    ];
                    for e in errs {
                        worst_fwd = worst_fwd.max(e);
                        assert!(e < 1e-5, "{shape:?} x={v}: {errs:?}");
                    }
                    let (x, li) = inverse(&shape, &theta, v as f64);
                    let (x32, li32) = inverse(&shape, &theta32, v);
                    let (tol_x, tol_l) = inverse_tolerances(&shape, &theta, x);
                    let errs = [
                        dist(x32 as f64, x) / tol_x,
                        (li32 as f64 - li).abs() / tol_l,
                    ];
                    for e in errs {
                        worst_inv = worst_inv.max(e);
                        assert!(e < 1.0, "{shape:?} y={v}: {errs:?} of the tolerances");
                    }
                }
            }
        }
        eprintln!(
            "f32 vs f64: forward worst relative difference {worst_fwd:.2e}, \
             inverse worst {worst_inv:.2} of its tolerance"
        );
    }

    #[test]
    fn batched_helpers_match_the_element_functions_and_check_lengths() {
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        for shape in shapes() {
            let n = 7;
            let np = shape.n_params();
            let theta: Vec<f64> = (0..n)
                .flat_map(|_| random_theta(&shape, 2.0, &mut rng))
                .collect();
            let x: Vec<f64> = (0..n).map(|_| 4.0 * rng.gen::<f64>() - 2.0).collect();
            let gy: Vec<f64> = (0..n).map(|_| rng.gen::<f64>() - 0.5).collect();
            let gl: Vec<f64> = (0..n).map(|_| rng.gen::<f64>() - 0.5).collect();
            let (mut y, mut ld) = (x.clone(), vec![0.0; n]);
            forward_rows(&shape, &theta, &mut y, &mut ld).unwrap();
            let (mut back, mut li) = (y.clone(), vec![0.0; n]);
            inverse_rows(&shape, &theta, &mut back, &mut li).unwrap();
            let (mut gt, mut gx) = (vec![9.0; n * np], vec![9.0; n]);
            forward_rows_backward(&shape, &theta, &x, &gy, &gl, &mut gt, &mut gx).unwrap();
            let (mut gti, mut gyi) = (vec![9.0; n * np], vec![9.0; n]);
            inverse_rows_backward(&shape, &theta, &y, &gy, &gl, &mut gti, &mut gyi).unwrap();
            for i in 0..n {
                let th = &theta[i * np..(i + 1) * np];
                assert_eq!(forward(&shape, th, x[i]), (y[i], ld[i]));
                assert_eq!(inverse(&shape, th, y[i]), (back[i], li[i]));
                let mut g = vec![0.0; np];
                assert_eq!(
                    forward_backward(&shape, th, x[i], gy[i], gl[i], &mut g),
                    gx[i]
                );
                assert_eq!(&g[..], &gt[i * np..(i + 1) * np]);
                let mut g = vec![0.0; np];
                assert_eq!(
                    inverse_backward(&shape, th, y[i], gy[i], gl[i], &mut g),
                    gyi[i]
                );
                assert_eq!(&g[..], &gti[i * np..(i + 1) * np]);
            }
            let mut short = vec![0.0; n - 1];
            assert!(forward_rows(&shape, &theta, &mut y, &mut short).is_err());
            assert!(inverse_rows(&shape, &theta[1..], &mut y, &mut ld).is_err());
            assert!(
                forward_rows_backward(&shape, &theta, &x, &gy, &gl, &mut gt, &mut short).is_err()
            );
            let bad = SplineShape { bins: 0, ..shape };
            assert!(forward_rows(&bad, &theta, &mut y, &mut ld).is_err());
        }
    }

    #[test]
    fn non_finite_inputs_do_not_panic() {
        let mut rng = ChaCha8Rng::seed_from_u64(10);
        for shape in shapes() {
            let theta = random_theta(&shape, 2.0, &mut rng);
            let mut g = vec![0.0; shape.n_params()];
            for v in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
                let _ = forward(&shape, &theta, v);
                let _ = inverse(&shape, &theta, v);
                let _ = forward_backward(&shape, &theta, v, 1.0, 1.0, &mut g);
                let _ = inverse_backward(&shape, &theta, v, 1.0, 1.0, &mut g);
                assert!(forward(&shape, &theta, v).0.is_nan() || !shape.circular);
            }
        }
    }
}
