//! One chunk's preallocated buffers and the passes over it: generation (z -> x),
//! inversion (x -> z), and the hand-derived backward passes of both.
//!
//! Everything a backward pass needs is kept on the tape by the forward pass: each
//! coupling layer's conditioner input, hidden activations (and sigmoids for SiLU), raw
//! outputs (raw s, then t), clamped s, and transformed outputs. No buffer is allocated
//! after construction, so a pass over a small configuration costs only its arithmetic.
//!
//! Backward derivation, per coupling layer with conditioning half a and transformed half
//! b (loss L, gradient g' with respect to the layer's output b', and a coefficient
//! alpha with which the layer's log-determinant sum(s) enters L):
//! - generation, b' = b e^s + t:  g_b = g' e^s, g_t = g', g_s = g' (b' - t) + alpha;
//! - inversion, b' = (b - t) e^-s: g_b = g' e^-s, g_t = -g_b, g_s = -g' b' + alpha;
//! - clamp, s = c tanh(r / c):      g_r = g_s (1 - (s / c)^2);
//! - then the conditioner MLP backward from (g_r, g_t) gives the weight and bias
//!   gradients and g_a, which is added to the gradient of the conditioning half.

use crate::flow::{Coupling, Flow};
use crate::fused;
use crate::real::{
    act_backward, add_col_sums, bias_act_forward, matmul, matmul_s, multiversion, tanh_fast, Real,
};
use crate::spec::Activation;

/// The per-layer part of a tape.
#[derive(Debug)]
struct LayerTape<T> {
    a_in: Vec<T>,
    hidden: Vec<Vec<T>>,
    aux: Vec<Vec<T>>,
    out: Vec<T>,
    s: Vec<T>,
    b_out: Vec<T>,
}

/// All buffers of one chunk of at most `cap` rows.
#[derive(Debug)]
pub(crate) struct Tape<T> {
    pub cap: usize,
    /// Threads given to each GEMM (1 when chunks run in parallel instead).
    pub gemm_threads: usize,
    layers: Vec<LayerTape<T>>,
    /// Flow coordinates: z on entry to generation, z on exit from inversion.
    pub state: Vec<T>,
    /// Gradient with respect to the flow coordinates (dL/dz after a generation backward).
    pub grad: Vec<T>,
    ybuf: Vec<T>,
    /// Data coordinates: output of generation, input of inversion.
    pub xbuf: Vec<T>,
    /// Gradient with respect to the data coordinates.
    pub gxbuf: Vec<T>,
    /// Per-row sum of the couplings' log-determinants in the pass's direction.
    pub logdet: Vec<T>,
    bufs: [Vec<T>; 3],
    da: Vec<T>,
    /// f64 scratch for energy calls: configurations, energies, forces.
    pub x64: Vec<f64>,
    pub e64: Vec<f64>,
    pub f64: Vec<f64>,
    /// Per-chunk statistics written by the workspace's closures.
    pub stats: [f64; 4],
    /// Whether each dense layer's gradient has been written since the last reset (the
    /// first write overwrites, so gradients never need zeroing).
    pub written: Vec<bool>,
    /// Whether passes keep the per-layer tape for a backward pass (training) or reuse
    /// one layer's buffers for all layers (sampling and density evaluation, which then
    /// stay in cache).
    pub record: bool,
    /// Small transposed copies for thin matrix products.
    scratch: Vec<T>,
    /// Whether passes may use the fused kernel where it applies (tests turn it off to
    /// compare with the layer-by-layer path).
    pub fused: bool,
    /// The error a closure met on this chunk, checked in chunk order afterwards.
    pub err: Option<crate::FlowError>,
    /// Rows this chunk processed since the workspace last reset it.
    pub rows_done: usize,
}

impl<T: Real> Tape<T> {
    /// Allocates every buffer for chunks of up to `cap` rows of `flow`.
    pub(crate) fn new(flow: &Flow<T>, cap: usize, gemm_threads: usize) -> Self {
        let (d, dx) = (flow.dim(), flow.data_dim());
        let h = flow.spec.hidden_width;
        let silu = flow.spec.activation == Activation::Silu;
        let z = |len: usize| vec![T::zero(); len];
        let mut max_w = 0;
        let layers = flow
            .layers
            .iter()
            .enumerate()
            .map(|(k, c)| {
                let nh = c.dense.len() - 1;
                max_w = max_w.max(2 * c.trans.len()).max(c.cond.len());
                // Layer 0's buffers also serve every layer in passes that keep no tape,
                // so they are sized for the widest split (odd dimensions alternate).
                let (na, nb) = if k == 0 {
                    (d - d / 2, d - d / 2)
                } else {
                    (c.cond.len(), c.trans.len())
                };
                LayerTape {
                    a_in: z(cap * na),
                    hidden: (0..nh).map(|_| z(cap * h)).collect(),
                    aux: (0..nh)
                        .map(|_| if silu { z(cap * h) } else { Vec::new() })
                        .collect(),
                    out: z(cap * 2 * nb),
                    s: z(cap * nb),
                    b_out: z(cap * nb),
                }
            })
            .collect();
        let wmax = max_w.max(h);
        Tape {
            cap,
            gemm_threads,
            layers,
            state: z(cap * d),
            grad: z(cap * d),
            ybuf: z(cap * d),
            xbuf: z(cap * dx),
            gxbuf: z(cap * dx),
            logdet: z(cap),
            bufs: [z(cap * wmax), z(cap * wmax), z(cap * wmax)],
            da: z(cap * d),
            x64: vec![0.0; cap * dx],
            e64: vec![0.0; cap],
            f64: vec![0.0; cap * dx],
            stats: [0.0; 4],
            written: vec![false; flow.layers.iter().map(|c| c.dense.len()).sum()],
            record: true,
            scratch: Vec::new(),
            fused: true,
            err: None,
            rows_done: 0,
        }
    }

    /// Generation of `n` rows: z in `state` -> x in `xbuf`, with the couplings'
    /// log-determinant sum(s) in `logdet` (the fixed layers' constant is not included).
    pub(crate) fn generate(&mut self, flow: &Flow<T>, n: usize) {
        let d = flow.dim();
        self.logdet[..n].fill(T::zero());
        for k in 0..flow.layers.len() {
            self.coupling(flow, k, n, true);
        }
        let src = if let Some(w) = &flow.whitening {
            matmul(
                n,
                d,
                d,
                &self.state,
                false,
                &w.chol,
                true,
                &mut self.ybuf,
                false,
                self.gemm_threads,
            );
            for row in self.ybuf[..n * d].chunks_exact_mut(d) {
                for (v, &m) in row.iter_mut().zip(&w.mean) {
                    *v += m;
                }
            }
            &self.ybuf
        } else {
            &self.state
        };
        flow.frame
            .to_data(n, &src[..n * d], &mut self.xbuf[..n * flow.data_dim()]);
    }

    /// Inversion of `n` rows: x in `xbuf` -> z in `state`, with the couplings'
    /// log-determinant of the inverse, -sum(s), in `logdet`.
    pub(crate) fn invert(&mut self, flow: &Flow<T>, n: usize) {
        let d = flow.dim();
        if let Some(w) = &flow.whitening {
            flow.frame.to_model(
                n,
                &self.xbuf[..n * flow.data_dim()],
                &mut self.ybuf[..n * d],
            );
            for row in self.ybuf[..n * d].chunks_exact_mut(d) {
                for (v, &m) in row.iter_mut().zip(&w.mean) {
                    *v -= m;
                }
            }
            matmul(
                n,
                d,
                d,
                &self.ybuf,
                false,
                &w.chol_inv,
                true,
                &mut self.state,
                false,
                self.gemm_threads,
            );
        } else {
            flow.frame.to_model(
                n,
                &self.xbuf[..n * flow.data_dim()],
                &mut self.state[..n * d],
            );
        }
        self.logdet[..n].fill(T::zero());
        for k in (0..flow.layers.len()).rev() {
            self.coupling(flow, k, n, false);
        }
    }

    /// Backward of `generate`: from dL/dx in `gxbuf`, with the couplings' log-det sum
    /// entering L as `alpha * sum(s)` per row, adds the parameter gradient into `pgrad`
    /// and leaves dL/dz in `grad`.
    pub(crate) fn generate_backward(
        &mut self,
        flow: &Flow<T>,
        n: usize,
        alpha: T,
        pgrad: &mut [T],
    ) {
        let d = flow.dim();
        if let Some(w) = &flow.whitening {
            flow.frame.to_model(
                n,
                &self.gxbuf[..n * flow.data_dim()],
                &mut self.ybuf[..n * d],
            );
            matmul(
                n,
                d,
                d,
                &self.ybuf,
                false,
                &w.chol,
                false,
                &mut self.grad,
                false,
                self.gemm_threads,
            );
        } else {
            flow.frame.to_model(
                n,
                &self.gxbuf[..n * flow.data_dim()],
                &mut self.grad[..n * d],
            );
        }
        for k in (0..flow.layers.len()).rev() {
            self.coupling_backward(flow, k, n, true, alpha, pgrad, true);
        }
    }

    /// Backward of `invert`: from dL/dz in `grad`, with the couplings' sum(s) entering L
    /// as `alpha * sum(s)` per row, adds the parameter gradient into `pgrad`; when
    /// `input_grad`, leaves dL/dx in `gxbuf`.
    pub(crate) fn invert_backward(
        &mut self,
        flow: &Flow<T>,
        n: usize,
        alpha: T,
        pgrad: &mut [T],
        input_grad: bool,
    ) {
        let d = flow.dim();
        let nl = flow.layers.len();
        for k in 0..nl {
            let need = input_grad || k + 1 < nl;
            self.coupling_backward(flow, k, n, false, alpha, pgrad, need);
        }
        if input_grad {
            let src = if let Some(w) = &flow.whitening {
                matmul(
                    n,
                    d,
                    d,
                    &self.grad,
                    false,
                    &w.chol_inv,
                    false,
                    &mut self.ybuf,
                    false,
                    self.gemm_threads,
                );
                &self.ybuf
            } else {
                &self.grad
            };
            flow.frame
                .to_data(n, &src[..n * d], &mut self.gxbuf[..n * flow.data_dim()]);
        }
    }

    /// Marks every dense layer's gradient as not yet written in this accumulation.
    pub(crate) fn reset_written(&mut self) {
        self.written.fill(false);
    }

    /// One coupling layer in either direction on `state`, recording the tape.
    fn coupling(&mut self, flow: &Flow<T>, k: usize, n: usize, gen: bool) {
        let c = &flow.layers[k];
        let d = flow.dim();
        let lt = &mut self.layers[if self.record { k } else { 0 }];
        let record = self.record;
        let clamp = T::of(flow.spec.clamp);
        let fused =
            self.fused && self.gemm_threads == 1 && fused::applies::<T>(c, flow.spec.activation, n);
        if fused && !record {
            fused::coupling(
                &flow.params,
                c,
                n,
                d,
                gen,
                flow.spec.clamp,
                &mut self.state,
                &mut self.logdet,
                [&mut lt.out, &mut lt.s, &mut lt.b_out],
                &mut self.scratch,
            );
            return;
        }
        if fused {
            let (h1, h2) = lt.hidden.split_at_mut(1);
            let (s1, s2) = lt.aux.split_at_mut(1);
            fused::conditioner_taped(
                &flow.params,
                c,
                n,
                d,
                &self.state,
                &mut lt.a_in,
                [&mut h1[0], &mut h2[0]],
                [&mut s1[0], &mut s2[0]],
                &mut lt.out,
                &mut self.scratch,
            );
        } else {
            gather_rows(n, d, &c.cond, &self.state, &mut lt.a_in);
            mlp_forward(
                &flow.params,
                c,
                flow.spec.activation,
                n,
                lt,
                self.gemm_threads,
                &mut self.scratch,
                record,
            );
        }
        coupling_elementwise(
            n,
            d,
            &c.trans,
            gen,
            clamp,
            &lt.out,
            &mut lt.s,
            &mut lt.b_out,
            &mut self.state,
            &mut self.logdet,
        );
    }

    /// Backward of one coupling layer (see the module doc for the formulas).
    #[allow(clippy::too_many_arguments)]
    fn coupling_backward(
        &mut self,
        flow: &Flow<T>,
        k: usize,
        n: usize,
        gen: bool,
        alpha: T,
        pgrad: &mut [T],
        input_grad: bool,
    ) {
        let c = &flow.layers[k];
        let d = flow.dim();
        let da = c.cond.len();
        let clamp = T::of(flow.spec.clamp);
        let lt = &self.layers[k];
        let (dout, gbuf) = pair_mut(&mut self.bufs, 0, 1);
        coupling_backward_elementwise(
            n,
            d,
            &c.trans,
            gen,
            alpha,
            clamp,
            &lt.out,
            &lt.s,
            &lt.b_out,
            &mut self.grad,
            dout,
            gbuf,
        );
        let first_dense: usize = flow.layers[..k].iter().map(|l| l.dense.len()).sum();
        let written = &mut self.written[first_dense..first_dense + c.dense.len()];
        mlp_backward(
            &flow.params,
            pgrad,
            c,
            flow.spec.activation,
            n,
            &self.layers[k],
            &mut self.bufs,
            &mut self.da,
            input_grad,
            written,
            self.gemm_threads,
            &mut self.scratch,
        );
        if input_grad {
            for i in 0..n {
                let grow = &mut self.grad[i * d..(i + 1) * d];
                for (&g, &j) in self.da[i * da..(i + 1) * da].iter().zip(&c.cond) {
                    grow[j] += g;
                }
            }
        }
    }
}

multiversion! {
    /// The affine transform of coupling layer rows: s = clamp tanh(raw / clamp), then
    /// b' = b e^s + t (generation) or (b - t) e^-s (inversion) on the `trans` columns of
    /// `state`, recording s and b' and adding +-sum(s) to each row's log-determinant.
    fn coupling_elementwise<T>(
        n: usize,
        d: usize,
        trans: &[usize],
        gen: bool,
        clamp: T,
        out: &[T],
        s_buf: &mut [T],
        b_out: &mut [T],
        state: &mut [T],
        logdet: &mut [T],
    ) = coupling_elementwise_k;
}

#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn coupling_elementwise_k<T: Real>(
    n: usize,
    d: usize,
    trans: &[usize],
    gen: bool,
    clamp: T,
    out: &[T],
    s_buf: &mut [T],
    b_out: &mut [T],
    state: &mut [T],
    logdet: &mut [T],
) {
    let db = trans.len();
    let inv_clamp = T::one() / clamp;
    for i in 0..n {
        let orow = &out[i * 2 * db..(i + 1) * 2 * db];
        let (rrow, trow) = orow.split_at(db);
        let srow = &mut s_buf[i * db..(i + 1) * db];
        let brow = &mut b_out[i * db..(i + 1) * db];
        let row = &mut state[i * d..(i + 1) * d];
        // Gather, transform contiguously (vectorised), scatter.
        for (b, &j) in brow.iter_mut().zip(trans) {
            *b = row[j];
        }
        let mut lanes = [T::zero(); 8];
        for ((((sc, bc), rc), tc), _) in srow
            .chunks_mut(8)
            .zip(brow.chunks_mut(8))
            .zip(rrow.chunks(8))
            .zip(trow.chunks(8))
            .zip(0..)
        {
            for l in 0..sc.len() {
                let s = clamp * tanh_fast(rc[l] * inv_clamp);
                bc[l] = if gen {
                    bc[l] * s.fexp() + tc[l]
                } else {
                    (bc[l] - tc[l]) * (-s).fexp()
                };
                sc[l] = s;
                lanes[l] += s;
            }
        }
        for (&b, &j) in brow.iter().zip(trans) {
            row[j] = b;
        }
        let sum = lanes.iter().fold(T::zero(), |a, &b| a + b);
        logdet[i] += if gen { sum } else { -sum };
    }
}

multiversion! {
    /// The element-wise part of a coupling layer's backward pass (formulas in the module
    /// doc): replaces the transformed columns of `grad` by g_b and writes (g_r, g_t) rows
    /// into `dout`.
    fn coupling_backward_elementwise<T>(
        n: usize,
        d: usize,
        trans: &[usize],
        gen: bool,
        alpha: T,
        clamp: T,
        out: &[T],
        s_buf: &[T],
        b_out: &[T],
        grad: &mut [T],
        dout: &mut [T],
        gbuf: &mut [T],
    ) = coupling_backward_elementwise_k;
}

#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn coupling_backward_elementwise_k<T: Real>(
    n: usize,
    d: usize,
    trans: &[usize],
    gen: bool,
    alpha: T,
    clamp: T,
    out: &[T],
    s_buf: &[T],
    b_out: &[T],
    grad: &mut [T],
    dout: &mut [T],
    gbuf: &mut [T],
) {
    let db = trans.len();
    let inv_clamp = T::one() / clamp;
    for i in 0..n {
        let trow = &out[i * 2 * db + db..(i + 1) * 2 * db];
        let srow = &s_buf[i * db..(i + 1) * db];
        let brow = &b_out[i * db..(i + 1) * db];
        let grow = &mut grad[i * d..(i + 1) * d];
        let (gr, gt) = dout[i * 2 * db..(i + 1) * 2 * db].split_at_mut(db);
        let gg = &mut gbuf[i * db..(i + 1) * db];
        // Gather g', compute contiguously (vectorised), scatter g_b.
        for (g, &j) in gg.iter_mut().zip(trans) {
            *g = grow[j];
        }
        for (((((gr, gt), gg), &s), &bn), &t) in gr
            .iter_mut()
            .zip(gt.iter_mut())
            .zip(gg.iter_mut())
            .zip(srow)
            .zip(brow)
            .zip(trow)
        {
            let g = *gg;
            let q = s * inv_clamp;
            let (gb, gs, gtv) = if gen {
                (g * s.fexp(), g * (bn - t) + alpha, g)
            } else {
                let gb = g * (-s).fexp();
                (gb, -(g * bn) + alpha, -gb)
            };
            *gr = gs * (T::one() - q * q);
            *gt = gtv;
            *gg = gb;
        }
        for (&g, &j) in gg.iter().zip(trans) {
            grow[j] = g;
        }
    }
}

/// The conditioner MLP of coupling `c` on the `n` rows of `lt.a_in`, writing hidden
/// activations and the raw output into the tape.
#[allow(clippy::too_many_arguments)]
fn mlp_forward<T: Real>(
    params: &[T],
    c: &Coupling,
    act: Activation,
    n: usize,
    lt: &mut LayerTape<T>,
    threads: usize,
    scratch: &mut Vec<T>,
    record: bool,
) {
    let nd = c.dense.len();
    for (l, dn) in c.dense.iter().enumerate() {
        let w = &params[dn.w..dn.w + dn.n_in * dn.n_out];
        let b = &params[dn.b..dn.b + dn.n_out];
        let (prev, rest) = lt.hidden.split_at_mut(l.min(nd - 1));
        let input: &[T] = if l == 0 { &lt.a_in } else { &prev[l - 1] };
        if l + 1 == nd {
            matmul_s(
                n,
                dn.n_out,
                dn.n_in,
                input,
                false,
                w,
                false,
                &mut lt.out,
                false,
                threads,
                scratch,
            );
            bias_act_forward(None, n, b, &mut lt.out, &mut []);
        } else {
            let out = &mut rest[0];
            matmul_s(
                n, dn.n_out, dn.n_in, input, false, w, false, out, false, threads, scratch,
            );
            let aux: &mut [T] = if record { &mut lt.aux[l] } else { &mut [] };
            bias_act_forward(Some(act), n, b, out, aux);
        }
    }
}

/// Copies the `cols` columns of the first `n` rows of `state` (`d` wide) into `out`.
fn gather_rows<T: Real>(n: usize, d: usize, cols: &[usize], state: &[T], out: &mut [T]) {
    let da = cols.len();
    for i in 0..n {
        let row = &state[i * d..(i + 1) * d];
        for (dst, &j) in out[i * da..(i + 1) * da].iter_mut().zip(cols) {
            *dst = row[j];
        }
    }
}

/// Two distinct mutable elements of a three-buffer array.
fn pair_mut<T>(bufs: &mut [Vec<T>; 3], i: usize, j: usize) -> (&mut Vec<T>, &mut Vec<T>) {
    debug_assert!(i != j);
    let [a, b, c] = bufs;
    match (i, j) {
        (0, 1) => (a, b),
        (0, 2) => (a, c),
        (1, 0) => (b, a),
        (1, 2) => (b, c),
        (2, 0) => (c, a),
        _ => (c, b),
    }
}

/// Backward of `mlp_forward` from the output gradient in `bufs[0]`. Weight gradients
/// overwrite on a layer's first write of an accumulation and add afterwards.
#[allow(clippy::too_many_arguments)]
fn mlp_backward<T: Real>(
    params: &[T],
    pgrad: &mut [T],
    c: &Coupling,
    act: Activation,
    n: usize,
    lt: &LayerTape<T>,
    bufs: &mut [Vec<T>; 3],
    da: &mut [T],
    input_grad: bool,
    written: &mut [bool],
    threads: usize,
    scratch: &mut Vec<T>,
) {
    let nd = c.dense.len();
    let mut cur = 0;
    for l in (0..nd).rev() {
        let dn = c.dense[l];
        let next = if cur == 1 { 2 } else { 1 };
        let (g, nxt) = pair_mut(bufs, cur, next);
        let g = &mut g[..n * dn.n_out];
        if l + 1 < nd {
            act_backward(act, &lt.hidden[l][..n * dn.n_out], &lt.aux[l], g);
        }
        let input: &[T] = if l == 0 { &lt.a_in } else { &lt.hidden[l - 1] };
        let acc = written[l];
        written[l] = true;
        let (wg, bg) = pgrad[dn.w..dn.b + dn.n_out].split_at_mut(dn.n_in * dn.n_out);
        matmul_s(
            dn.n_in, dn.n_out, n, input, true, g, false, wg, acc, threads, scratch,
        );
        if !acc {
            bg.fill(T::zero());
        }
        add_col_sums(n, g, bg);
        let w = &params[dn.w..dn.w + dn.n_in * dn.n_out];
        if l > 0 {
            matmul_s(
                n, dn.n_in, dn.n_out, g, false, w, true, nxt, false, threads, scratch,
            );
            cur = next;
        } else if input_grad {
            matmul_s(
                n, dn.n_in, dn.n_out, g, false, w, true, da, false, threads, scratch,
            );
        }
    }
}
