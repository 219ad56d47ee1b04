//! The conditioner networks of the layer stack: a dense network (an MLP over one row of
//! conditioning values) and a periodic convolutional network over an L×L lattice, which
//! is the same dense stack applied to every site's k×k neighbourhood (a patch gathered
//! with periodic wrap-around), so that it commutes with lattice translations.
//!
//! Both keep what their backward pass needs in a [`NetTape`]: the input and every
//! layer's post-activation output (and the pre-activation of hidden layers). Backward
//! re-gathers patches from those, so memory stays O(rows × channels).
//!
//! Parameter layout per linear layer l: W [n_in · patch, n_out] row-major, then b [n_out].

use crate::real::{matmul_s, multiversion, Real};
use crate::spec::Activation;
use rand::Rng;
use rand_chacha::ChaCha8Rng;

/// Shape of a conditioner network.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct NetShape {
    /// Channels (or widths) from input to output: [c_in, h1, ..., c_out].
    pub sizes: Vec<usize>,
    /// Hidden nonlinearity.
    pub activation: Activation,
    /// `Some((side, kernel))` for a periodic convolution over a side×side lattice with a
    /// kernel×kernel patch (kernel odd); `None` for a dense network over rows.
    pub conv: Option<(usize, usize)>,
}

impl NetShape {
    /// Values in one patch per input channel (1 for a dense network).
    fn patch(&self) -> usize {
        self.conv.map_or(1, |(_, k)| k * k)
    }

    /// Sites per configuration (1 for a dense network).
    pub fn sites(&self) -> usize {
        self.conv.map_or(1, |(l, _)| l * l)
    }

    /// (rows, columns) of every linear layer's weight matrix.
    pub fn linear_shapes(&self) -> Vec<(usize, usize)> {
        let p = self.patch();
        self.sizes.windows(2).map(|w| (w[0] * p, w[1])).collect()
    }

    /// Number of parameters, without overflow for any sizes (for bounds checks).
    pub fn n_params_u128(&self) -> u128 {
        let p = self.patch() as u128;
        self.sizes
            .windows(2)
            .map(|w| w[0] as u128 * p * w[1] as u128 + w[1] as u128)
            .sum()
    }

    /// Number of parameters.
    pub fn n_params(&self) -> usize {
        let p = self.patch();
        self.sizes.windows(2).map(|w| w[0] * p * w[1] + w[1]).sum()
    }

    /// Glorot-uniform hidden weights, zero biases, and a zero output layer, so that a new
    /// network outputs exactly zero (a new coupling layer is then the identity).
    pub fn init<T: Real>(&self, rng: &mut ChaCha8Rng, out: &mut [T]) {
        let p = self.patch();
        let mut off = 0;
        let last = self.sizes.len() - 2;
        for (l, w) in self.sizes.windows(2).enumerate() {
            let (fan_in, fan_out) = (w[0] * p, w[1]);
            let limit = (6.0 / (fan_in + fan_out) as f64).sqrt();
            for v in &mut out[off..off + fan_in * fan_out] {
                *v = if l == last {
                    T::zero()
                } else {
                    T::of(rng.gen_range(-limit..limit))
                };
            }
            off += fan_in * fan_out;
            out[off..off + fan_out].fill(T::zero());
            off += fan_out;
        }
    }
}

/// What a forward pass keeps for its backward pass.
#[derive(Debug, Default)]
pub(crate) struct NetTape<T> {
    /// post[0] is the input; post[l + 1] the output of linear layer l (after its
    /// activation for hidden layers).
    post: Vec<Vec<T>>,
    /// Pre-activations of hidden layers.
    pre: Vec<Vec<T>>,
    /// Gathered patches (scratch).
    patches: Vec<T>,
    /// Gradient buffers (scratch).
    g_a: Vec<T>,
    g_b: Vec<T>,
    /// Scratch of the narrow-product kernels.
    mm: Vec<T>,
}

impl<T: Real> NetTape<T> {
    /// The input buffer, sized for `rows` rows (for a convolution, rows × sites), to be
    /// filled by the caller before [`forward`].
    pub fn input(&mut self, shape: &NetShape, rows: usize) -> &mut [T] {
        if self.post.len() != shape.sizes.len() {
            self.post = vec![Vec::new(); shape.sizes.len()];
            self.pre = vec![Vec::new(); shape.sizes.len()];
        }
        let n = rows * shape.sites() * shape.sizes[0];
        self.post[0].resize(n, T::zero());
        &mut self.post[0][..n]
    }

    /// The output of the last forward pass: [rows × sites, c_out].
    pub fn output(&self) -> &[T] {
        self.post.last().map_or(&[], |v| &v[..])
    }
}

/// For every site of a side×side periodic lattice, the sites of its kernel×kernel
/// neighbourhood (row offsets outer, column offsets inner).
fn neighbour_table(side: usize, k: usize) -> Vec<usize> {
    let h = (k / 2) as isize;
    let mut t = Vec::with_capacity(side * side * k * k);
    for r in 0..side {
        for col in 0..side {
            for dr in -h..=h {
                let rr = (r as isize + dr).rem_euclid(side as isize) as usize;
                for dc in -h..=h {
                    let cc = (col as isize + dc).rem_euclid(side as isize) as usize;
                    t.push(rr * side + cc);
                }
            }
        }
    }
    t
}

/// `dst.copy_from_slice(src)` for the few channels of one site, in blocks of 8 of
/// known length so that the compiler inlines them instead of calling memcpy.
#[inline(always)]
fn copy_small<T: Real>(dst: &mut [T], src: &[T]) {
    if dst.len().is_multiple_of(8) {
        for (d8, s8) in dst.chunks_exact_mut(8).zip(src.chunks_exact(8)) {
            let d8: &mut [T; 8] = d8.try_into().expect("chunks of 8");
            let s8: &[T; 8] = s8.try_into().expect("chunks of 8");
            *d8 = *s8;
        }
    } else {
        for (d, &s) in dst.iter_mut().zip(src) {
            *d = s;
        }
    }
}

/// Gathers the kernel×kernel periodic neighbourhood of every site: `src` is
/// [n × side², c] (site-major, channels last), `dst` [n × side², k² c].
fn gather_patches<T: Real>(src: &[T], n: usize, side: usize, k: usize, c: usize, dst: &mut [T]) {
    let s = side * side;
    let kk = k * k;
    let table = neighbour_table(side, k);
    for i in 0..n {
        let src_i = &src[i * s * c..(i + 1) * s * c];
        let dst_i = &mut dst[i * s * kk * c..(i + 1) * s * kk * c];
        for (patch, nbrs) in dst_i.chunks_exact_mut(kk * c).zip(table.chunks_exact(kk)) {
            for (out, &j) in patch.chunks_exact_mut(c).zip(nbrs) {
                copy_small(out, &src_i[j * c..(j + 1) * c]);
            }
        }
    }
}

/// The adjoint of [`gather_patches`]: adds every patch gradient back onto its sites.
fn scatter_patches<T: Real>(
    g_patch: &[T],
    n: usize,
    side: usize,
    k: usize,
    c: usize,
    dst: &mut [T],
) {
    let s = side * side;
    let kk = k * k;
    let table = neighbour_table(side, k);
    dst[..n * s * c].fill(T::zero());
    for i in 0..n {
        let dst_i = &mut dst[i * s * c..(i + 1) * s * c];
        let g_i = &g_patch[i * s * kk * c..(i + 1) * s * kk * c];
        for (patch, nbrs) in g_i.chunks_exact(kk * c).zip(table.chunks_exact(kk)) {
            for (gv, &j) in patch.chunks_exact(c).zip(nbrs) {
                for (o, &v) in dst_i[j * c..(j + 1) * c].iter_mut().zip(gv) {
                    *o += v;
                }
            }
        }
    }
}

multiversion! {
    /// post = act(pre), element-wise.
    fn act_slice<T>(a: Activation, pre: &[T], post: &mut [T]) = act_slice_k;
}

#[inline(always)]
fn act_slice_k<T: Real>(a: Activation, pre: &[T], post: &mut [T]) {
    let (one, two) = (T::one(), T::one() + T::one());
    match a {
        Activation::Tanh => {
            for (y, &x) in post.iter_mut().zip(pre) {
                *y = one - two / (one + (two * x).fexp());
            }
        }
        Activation::Silu => {
            for (y, &x) in post.iter_mut().zip(pre) {
                *y = x / (one + (-x).fexp());
            }
        }
        Activation::Relu => {
            for (y, &x) in post.iter_mut().zip(pre) {
                *y = x.max(T::zero());
            }
        }
    }
}

multiversion! {
    /// g *= act'(pre), with post = act(pre).
    fn act_grad_slice<T>(a: Activation, pre: &[T], post: &[T], g: &mut [T]) = act_grad_slice_k;
}

#[inline(always)]
fn act_grad_slice_k<T: Real>(a: Activation, pre: &[T], post: &[T], g: &mut [T]) {
    let one = T::one();
    match a {
        Activation::Tanh => {
            for (g, &h) in g.iter_mut().zip(post) {
                *g *= one - h * h;
            }
        }
        Activation::Silu => {
            for ((g, &x), &h) in g.iter_mut().zip(pre).zip(post) {
                let s = one / (one + (-x).fexp());
                *g *= s + h * (one - s);
            }
        }
        Activation::Relu => {
            for (g, &x) in g.iter_mut().zip(pre) {
                if x <= T::zero() {
                    *g = T::zero();
                }
            }
        }
    }
}

/// Runs the network on `rows` rows whose input the caller wrote into
/// [`NetTape::input`]; the result is [`NetTape::output`].
pub(crate) fn forward<T: Real>(shape: &NetShape, params: &[T], rows: usize, tape: &mut NetTape<T>) {
    let m = rows * shape.sites();
    let p = shape.patch();
    let n_lin = shape.sizes.len() - 1;
    let mut off = 0;
    for l in 0..n_lin {
        let (ci, co) = (shape.sizes[l], shape.sizes[l + 1]);
        let kin = ci * p;
        let (w, b) = (
            &params[off..off + kin * co],
            &params[off + kin * co..off + kin * co + co],
        );
        off += kin * co + co;
        let (head, tail) = tape.post.split_at_mut(l + 1);
        let src = &head[l][..m * ci];
        let dst = &mut tail[0];
        dst.resize(m * co, T::zero());
        let a: &[T] = match shape.conv {
            Some((side, k)) => {
                tape.patches.resize(m * kin, T::zero());
                gather_patches(src, rows, side, k, ci, &mut tape.patches);
                &tape.patches[..m * kin]
            }
            None => src,
        };
        matmul_s(m, co, kin, a, false, w, false, dst, false, 1, &mut tape.mm);
        for row in dst.chunks_mut(co) {
            for (v, &bb) in row.iter_mut().zip(b) {
                *v += bb;
            }
        }
        if l + 1 < n_lin {
            let pre = &mut tape.pre[l];
            pre.resize(m * co, T::zero());
            pre.copy_from_slice(&dst[..m * co]);
            act_slice(shape.activation, pre, dst);
        }
    }
}

/// Backward pass of the last [`forward`] on the same tape: `g_out` is dL/d(output)
/// ([rows × sites, c_out]); adds dL/dparams into `g_params` and writes dL/d(input) into
/// `g_in` ([rows × sites, c_in]).
pub(crate) fn backward<T: Real>(
    shape: &NetShape,
    params: &[T],
    rows: usize,
    tape: &mut NetTape<T>,
    g_out: &[T],
    g_params: &mut [T],
    g_in: &mut [T],
) {
    let m = rows * shape.sites();
    let p = shape.patch();
    let n_lin = shape.sizes.len() - 1;
    // Offsets of each linear layer's parameters.
    let mut offs = Vec::with_capacity(n_lin);
    let mut off = 0;
    for l in 0..n_lin {
        offs.push(off);
        off += shape.sizes[l] * p * shape.sizes[l + 1] + shape.sizes[l + 1];
    }
    let mut g = std::mem::take(&mut tape.g_a);
    let mut g_prev = std::mem::take(&mut tape.g_b);
    g.clear();
    g.extend_from_slice(&g_out[..m * shape.sizes[n_lin]]);
    for l in (0..n_lin).rev() {
        let (ci, co) = (shape.sizes[l], shape.sizes[l + 1]);
        let kin = ci * p;
        if l + 1 < n_lin {
            act_grad_slice(shape.activation, &tape.pre[l], &tape.post[l + 1], &mut g);
        }
        let o = offs[l];
        let w = &params[o..o + kin * co];
        let src = &tape.post[l][..m * ci];
        let a: &[T] = match shape.conv {
            Some((side, k)) => {
                tape.patches.resize(m * kin, T::zero());
                gather_patches(src, rows, side, k, ci, &mut tape.patches);
                &tape.patches[..m * kin]
            }
            None => src,
        };
        // dW += a^T g; db += colsum g.
        let (gw, gb) = g_params[o..o + kin * co + co].split_at_mut(kin * co);
        matmul_s(kin, co, m, a, true, &g, false, gw, true, 1, &mut tape.mm);
        for row in g.chunks(co) {
            for (acc, &v) in gb.iter_mut().zip(row) {
                *acc += v;
            }
        }
        // d(input) = g W^T (through the patches for a convolution).
        let dst: &mut Vec<T> = &mut g_prev;
        match shape.conv {
            Some((side, k)) => {
                tape.patches.resize(m * kin, T::zero());
                matmul_s(
                    m,
                    kin,
                    co,
                    &g,
                    false,
                    w,
                    true,
                    &mut tape.patches,
                    false,
                    1,
                    &mut tape.mm,
                );
                dst.resize(m * ci, T::zero());
                scatter_patches(&tape.patches, rows, side, k, ci, dst);
            }
            None => {
                dst.resize(m * ci, T::zero());
                matmul_s(m, ci, co, &g, false, w, true, dst, false, 1, &mut tape.mm);
            }
        }
        std::mem::swap(&mut g, &mut g_prev);
    }
    g_in[..m * shape.sizes[0]].copy_from_slice(&g[..m * shape.sizes[0]]);
    tape.g_a = g;
    tape.g_b = g_prev;
}
