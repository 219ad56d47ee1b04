//! The fused forward pass of a narrow coupling layer on f32 with AVX-512: sampling,
//! latent Monte Carlo and density passes run the whole layer here, taped (training)
//! passes run the conditioner here and keep what the backward pass reads.
//!
//! A narrow conditioner (two SiLU hidden layers at most 64 wide, as in low-dimensional
//! systems) spends as much time between its matrix products as in them when every
//! layer is a separate call: the hidden activations go to memory and back, and each
//! call has its own loop set-up. Here six rows at a time go through the whole MLP with
//! the second hidden layer held in 24 vector registers, the conditioning half gathered
//! straight from the flow state, and SiLU computed in registers in base 2 with a
//! reciprocal estimate refined by one Newton step instead of a division. A pass without
//! a tape then maps the transformed half 16 values per instruction.
//!
//! Results agree with the layer-by-layer path to float32 rounding (a few ulp per layer),
//! not bit for bit: the sums run in another order and SiLU is approximated differently.
//! Owns: this kernel and the tests of its agreement. Must not touch: the backward pass
//! (`tape.rs` keeps it layer by layer, reading the activations and sigmoids kept here).

use crate::flow::Coupling;
use crate::real::Real;
use crate::spec::Activation;

/// Rows of one block: the second hidden layer of 6 rows fills 24 of the 32 registers.
const ROWS: usize = 6;

/// Whether the fused kernel handles coupling `c` for `n` rows on this CPU: f32, SiLU,
/// two hidden layers of one width that is a multiple of 16 up to 64, at most 64
/// conditioning inputs and 16 outputs (8 transformed coordinates), at least one full
/// block of rows.
pub(crate) fn applies<T: Real>(c: &Coupling, act: Activation, n: usize) -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        use std::any::TypeId;
        if TypeId::of::<T>() != TypeId::of::<f32>() || act != Activation::Silu || n < ROWS {
            return false;
        }
        let [l1, l2, l3] = c.dense.as_slice() else {
            return false;
        };
        let h = l1.n_out;
        h.is_multiple_of(16)
            && (16..=64).contains(&h)
            && l1.n_in == c.cond.len()
            && l1.n_in <= 64
            && (l2.n_in, l2.n_out, l3.n_in) == (h, h, h)
            && (1..=16).contains(&l3.n_out)
            && std::is_x86_feature_detected!("avx512f")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = (c, act, n);
        false
    }
}

/// One whole coupling layer `c` on the first `n` rows of `state` (`d` columns): the
/// conditioner on the conditioning columns, then the affine map of the transformed
/// columns in place (b' = b e^s + t when `gen`, else (b - t) e^-s, with s = clamp
/// tanh(raw / clamp)), adding +-sum(s) to each row's `logdet`. `out` (at least n x
/// outputs values), `s_buf` and `b_buf` (n x transformed each) are work space, and
/// `scratch` holds the transposed output weights; it grows once and is then reused.
///
/// Callers check `applies` first; a call that fails it is a bug in this crate.
#[allow(clippy::too_many_arguments)]
pub(crate) fn coupling<T: Real>(
    params: &[T],
    c: &Coupling,
    n: usize,
    d: usize,
    gen: bool,
    clamp: f64,
    state: &mut [T],
    logdet: &mut [T],
    bufs: [&mut [T]; 3],
    scratch: &mut Vec<T>,
) {
    assert!(applies::<T>(c, Activation::Silu, n), "fused kernel misused");
    let [out, s_buf, b_buf] = bufs;
    let (n_out, db) = (c.dense[2].n_out, c.trans.len());
    assert_eq!(d, c.cond.len() + db, "state width");
    assert!(state.len() >= n * d && logdet.len() >= n && n_out == 2 * db);
    assert!(out.len() >= n * n_out && s_buf.len() >= n * db && b_buf.len() >= n * db);
    transpose_output_weights(params, c, scratch);
    #[cfg(target_arch = "x86_64")]
    {
        use crate::real::narrow::{as_f32, as_f32_mut};
        // SAFETY: `applies` checked that T is f32 and that the CPU has AVX-512F; the
        // lengths read and written are asserted above and in `Kernel::new`.
        unsafe {
            let k = Kernel::new(as_f32(params), c, as_f32(scratch), gen, clamp);
            let (st, out) = (as_f32_mut(state), as_f32_mut(out));
            let (raw, t) = out[..n * n_out].split_at_mut(n * db);
            k.dispatch(n, d, st, raw, t, None);
            let bufs = [raw, t, as_f32_mut(s_buf), as_f32_mut(b_buf)];
            k.affine(n, d, st, as_f32_mut(logdet), bufs);
        }
    }
}

/// The conditioner of coupling `c` on the first `n` rows of `state` for a pass that
/// keeps its tape: writes the conditioning inputs to `a_in`, each hidden layer's
/// activations and sigmoids to `hidden` and `sigmoid`, and the raw output rows (raw s,
/// then t) to `out`, in the layouts the layer-by-layer backward pass reads.
///
/// Callers check `applies` first; a call that fails it is a bug in this crate.
#[allow(clippy::too_many_arguments)]
pub(crate) fn conditioner_taped<T: Real>(
    params: &[T],
    c: &Coupling,
    n: usize,
    d: usize,
    state: &[T],
    a_in: &mut [T],
    hidden: [&mut [T]; 2],
    sigmoid: [&mut [T]; 2],
    out: &mut [T],
    scratch: &mut Vec<T>,
) {
    assert!(applies::<T>(c, Activation::Silu, n), "fused kernel misused");
    let (h, n_out, da) = (c.dense[0].n_out, c.dense[2].n_out, c.cond.len());
    assert_eq!(d, da + c.trans.len(), "state width");
    assert!(state.len() >= n * d && a_in.len() >= n * da && out.len() >= n * n_out);
    assert!(hidden.iter().chain(&sigmoid).all(|b| b.len() >= n * h));
    transpose_output_weights(params, c, scratch);
    #[cfg(target_arch = "x86_64")]
    {
        use crate::real::narrow::{as_f32, as_f32_mut};
        let [h1, h2] = hidden;
        let [s1, s2] = sigmoid;
        // SAFETY: as in `coupling`.
        unsafe {
            let k = Kernel::new(as_f32(params), c, as_f32(scratch), true, 1.0);
            let mut taped = Taped {
                a_in: as_f32_mut(a_in),
                hidden: [as_f32_mut(h1), as_f32_mut(h2)],
                sigmoid: [as_f32_mut(s1), as_f32_mut(s2)],
                out: as_f32_mut(out),
            };
            k.dispatch(n, d, as_f32(state), &mut [], &mut [], Some(&mut taped));
        }
    }
}

/// Writes the output layer's weights transposed (one row of h per output) into
/// `scratch`, for the dot-product form of the output layer.
fn transpose_output_weights<T: Real>(params: &[T], c: &Coupling, scratch: &mut Vec<T>) {
    let (l3, h) = (c.dense[2], c.dense[0].n_out);
    let n_out = l3.n_out;
    scratch.clear();
    scratch.extend((0..n_out).flat_map(|j| (0..h).map(move |q| params[l3.w + q * n_out + j])));
}

/// Where a taped pass keeps the conditioner's intermediate values.
#[cfg(target_arch = "x86_64")]
struct Taped<'a> {
    a_in: &'a mut [f32],
    hidden: [&'a mut [f32]; 2],
    sigmoid: [&'a mut [f32]; 2],
    out: &'a mut [f32],
}

/// One coupling's conditioner weights (as f32 slices) and affine settings.
#[cfg(target_arch = "x86_64")]
struct Kernel<'a> {
    cond: &'a [usize],
    trans: &'a [usize],
    w1: &'a [f32],
    b1: &'a [f32],
    w2: &'a [f32],
    b2: &'a [f32],
    w3: &'a [f32],
    w3t: &'a [f32],
    b3: &'a [f32],
    n_out: usize,
    gen: bool,
    clamp: f32,
}

#[cfg(target_arch = "x86_64")]
mod simd {
    use std::arch::x86_64::*;

    /// 2^t in 16 lanes for t <= 126 (larger t are clamped there): t = n + f with n an
    /// integer and |f| <= 1/2, 2^f by a degree-5 polynomial fitted for relative error
    /// with its constant term held at 1 (so 2^0 = 1 exactly; 1.7e-7 relative in f32),
    /// and 2^n applied by `vscalefps`, which also flushes very negative t to 0 without a
    /// lower clamp. NaN propagates.
    #[target_feature(enable = "avx512f")]
    #[inline]
    fn exp2(t: __m512) -> __m512 {
        // vminps returns its second operand when either is NaN: NaN stays NaN.
        let t = _mm512_min_ps(_mm512_set1_ps(126.0), t);
        let n = _mm512_roundscale_ps::<{ _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC }>(t);
        let f = _mm512_sub_ps(t, n);
        let mut p = _mm512_set1_ps(1.326_472_4e-3);
        // Fitted coefficients (the linear one is close to ln 2 but is not ln 2), from
        // crates/flow/tools/fit_exp2.py.
        #[allow(clippy::approx_constant)]
        for c in [9.671_513e-3, 5.550_733_6e-2, 0.240_222_42, 0.693_147, 1.0] {
            p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(c));
        }
        _mm512_scalef_ps(p, n)
    }

    /// e^x in 16 lanes as 2^(x log2 e), for x clamped to [-87, 87]: rounding x log2 e
    /// adds a relative error of about 6e-8 |x log2 e|, below 1e-6 for |x| < 12.
    #[target_feature(enable = "avx512f")]
    #[inline]
    pub(super) fn exp(x: __m512) -> __m512 {
        // Operand order keeps NaN: vmaxps returns its second operand on NaN.
        let x = _mm512_max_ps(_mm512_set1_ps(-87.0), x);
        exp2(_mm512_mul_ps(x, _mm512_set1_ps(std::f32::consts::LOG2_E)))
    }

    /// SiLU p / (1 + e^-p) = p r with r = 1 / (1 + 2^(-p log2 e)): r from `vrcp14ps` (14
    /// bits) with one Newton step folded into the product, p r + p r (1 - den r), instead
    /// of a division. Its relative error where it matters (|p| < 12) is below 1e-6.
    #[target_feature(enable = "avx512f")]
    #[inline]
    pub(super) fn silu(p: __m512) -> __m512 {
        let one = _mm512_set1_ps(1.0);
        let den = _mm512_add_ps(
            one,
            exp2(_mm512_mul_ps(p, _mm512_set1_ps(-std::f32::consts::LOG2_E))),
        );
        let r = _mm512_rcp14_ps(den);
        let pr = _mm512_mul_ps(p, r);
        _mm512_fmadd_ps(pr, _mm512_fnmadd_ps(den, r, one), pr)
    }

    /// SiLU and the sigmoid it multiplied by, for passes whose backward needs both:
    /// (p r, r) with r the Newton-refined reciprocal of 1 + e^-p.
    #[target_feature(enable = "avx512f")]
    #[inline]
    pub(super) fn silu_and_sigmoid(p: __m512) -> (__m512, __m512) {
        let one = _mm512_set1_ps(1.0);
        let den = _mm512_add_ps(
            one,
            exp2(_mm512_mul_ps(p, _mm512_set1_ps(-std::f32::consts::LOG2_E))),
        );
        let r = _mm512_rcp14_ps(den);
        let r = _mm512_fmadd_ps(r, _mm512_fnmadd_ps(den, r, one), r);
        (_mm512_mul_ps(p, r), r)
    }

    /// c tanh(x / c) as c (1 - 2 / (1 + e^{2x/c})), the form of `tanh_fast`.
    #[target_feature(enable = "avx512f")]
    #[inline]
    pub(super) fn clamped_tanh(x: __m512, c: f32) -> __m512 {
        let e = exp(_mm512_mul_ps(x, _mm512_set1_ps(2.0 / c)));
        let q = _mm512_div_ps(_mm512_set1_ps(2.0), _mm512_add_ps(_mm512_set1_ps(1.0), e));
        _mm512_mul_ps(_mm512_set1_ps(c), _mm512_sub_ps(_mm512_set1_ps(1.0), q))
    }
}

/// SiLU of 16 pre-activations; a taped pass also keeps the activations and sigmoids of
/// hidden layer `layer` at offset `at`.
///
/// # Safety
/// AVX-512F; `at + 16` within the taped buffers.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
#[inline]
unsafe fn activate(
    p: std::arch::x86_64::__m512,
    taped: &mut Option<&mut Taped>,
    layer: usize,
    at: usize,
) -> std::arch::x86_64::__m512 {
    use std::arch::x86_64::*;
    match taped.as_deref_mut() {
        None => simd::silu(p),
        Some(tp) => {
            let (y, sig) = simd::silu_and_sigmoid(p);
            // SAFETY: the caller keeps `at + 16` within the buffers.
            unsafe {
                _mm512_storeu_ps(tp.hidden[layer].as_mut_ptr().add(at), y);
                _mm512_storeu_ps(tp.sigmoid[layer].as_mut_ptr().add(at), sig);
            }
            y
        }
    }
}

#[cfg(target_arch = "x86_64")]
impl<'a> Kernel<'a> {
    /// The kernel of coupling `c` over f32 parameters, with the transposed output
    /// weights `w3t`; panics (a bug in this crate) if the parameters are too short.
    fn new(p: &'a [f32], c: &'a Coupling, w3t: &'a [f32], gen: bool, clamp: f64) -> Self {
        let [l1, l2, l3] = [c.dense[0], c.dense[1], c.dense[2]];
        let (h, n_out) = (l1.n_out, l3.n_out);
        assert!(c
            .cond
            .iter()
            .chain(&c.trans)
            .all(|&j| j < c.cond.len() + c.trans.len()));
        assert!(w3t.len() >= n_out * h);
        Kernel {
            cond: &c.cond,
            trans: &c.trans,
            w1: &p[l1.w..l1.w + l1.n_in * h],
            b1: &p[l1.b..l1.b + h],
            w2: &p[l2.w..l2.w + h * h],
            b2: &p[l2.b..l2.b + h],
            w3: &p[l3.w..l3.w + h * n_out],
            w3t,
            b3: &p[l3.b..l3.b + n_out],
            n_out,
            gen,
            clamp: clamp as f32,
        }
    }

    /// `conditioner` for this kernel's hidden width.
    ///
    /// # Safety
    /// AVX-512F, and the slice lengths the callers assert.
    unsafe fn dispatch(
        &self,
        n: usize,
        d: usize,
        state: &[f32],
        raw: &mut [f32],
        t: &mut [f32],
        taped: Option<&mut Taped>,
    ) {
        // SAFETY: forwarded from the caller.
        unsafe {
            match self.w1.len() / self.cond.len() / 16 {
                1 => self.conditioner::<1>(n, d, state, raw, t, taped),
                2 => self.conditioner::<2>(n, d, state, raw, t, taped),
                3 => self.conditioner::<3>(n, d, state, raw, t, taped),
                _ => self.conditioner::<4>(n, d, state, raw, t, taped),
            }
        }
    }

    /// The conditioner of all `n` rows (n >= ROWS), in blocks of ROWS, writing raw s to
    /// `raw` and t to `t` (n x transformed each), or, for a taped pass, everything to
    /// `taped`. The last block overlaps the one before instead of running a scalar tail
    /// (rows are independent and only read; overlapping rows get the same values again).
    #[target_feature(enable = "avx512f")]
    fn conditioner<const NV: usize>(
        &self,
        n: usize,
        d: usize,
        state: &[f32],
        raw: &mut [f32],
        t: &mut [f32],
        mut taped: Option<&mut Taped>,
    ) {
        use std::arch::x86_64::*;
        let (h, da, db, n_out) = (16 * NV, self.cond.len(), self.trans.len(), self.n_out);
        let mut hid = [0.0f32; ROWS * 64];
        let mut i = 0;
        while i < n {
            let i0 = if i + ROWS <= n { i } else { n - ROWS };
            // SAFETY (whole block): every offset stays inside the slices, whose lengths
            // the callers asserted (rows i0..i0+ROWS <= n, columns < d, h, n_out).
            unsafe {
                // First hidden layer, row by row, into `hid` (its entries are broadcast
                // one at a time by the second layer).
                for r in 0..ROWS {
                    let row = state.as_ptr().add((i0 + r) * d);
                    let mut acc = [_mm512_setzero_ps(); NV];
                    for (p, &j) in self.cond.iter().enumerate() {
                        let x = *row.add(j);
                        if let Some(tp) = taped.as_deref_mut() {
                            tp.a_in[(i0 + r) * da + p] = x;
                        }
                        let a = _mm512_set1_ps(x);
                        for (v, accv) in acc.iter_mut().enumerate() {
                            let w = _mm512_loadu_ps(self.w1.as_ptr().add(p * h + 16 * v));
                            *accv = _mm512_fmadd_ps(a, w, *accv);
                        }
                    }
                    for (v, &accv) in acc.iter().enumerate() {
                        let b = _mm512_loadu_ps(self.b1.as_ptr().add(16 * v));
                        let y =
                            activate(_mm512_add_ps(accv, b), &mut taped, 0, (i0 + r) * h + 16 * v);
                        _mm512_storeu_ps(hid.as_mut_ptr().add(r * h + 16 * v), y);
                    }
                }
                // Second hidden layer: ROWS x NV accumulators stay in registers.
                let mut acc = [[_mm512_setzero_ps(); NV]; ROWS];
                for p in 0..h {
                    let mut w = [_mm512_setzero_ps(); NV];
                    for (v, wv) in w.iter_mut().enumerate() {
                        *wv = _mm512_loadu_ps(self.w2.as_ptr().add(p * h + 16 * v));
                    }
                    for (r, accr) in acc.iter_mut().enumerate() {
                        let a = _mm512_set1_ps(*hid.as_ptr().add(r * h + p));
                        for v in 0..NV {
                            accr[v] = _mm512_fmadd_ps(a, w[v], accr[v]);
                        }
                    }
                }
                for (r, accr) in acc.iter_mut().enumerate() {
                    for (v, x) in accr.iter_mut().enumerate() {
                        let b = _mm512_loadu_ps(self.b2.as_ptr().add(16 * v));
                        *x = activate(_mm512_add_ps(*x, b), &mut taped, 1, (i0 + r) * h + 16 * v);
                    }
                }
                let mut put = |r: usize, j: usize, v: f32| match taped.as_deref_mut() {
                    Some(tp) => tp.out[(i0 + r) * n_out + j] = v,
                    None if j < db => raw[(i0 + r) * db + j] = v,
                    None => t[(i0 + r) * db + j - db] = v,
                };
                self.output_layer::<NV>(&acc, &mut hid, &mut put);
            }
            i = i0 + ROWS;
        }
    }

    /// The output layer of one block (output j of block row r handed to `put`) from the
    /// second hidden layer in registers: dot products for up to 4 outputs, otherwise one
    /// masked row of outputs per row from `hid`.
    #[target_feature(enable = "avx512f")]
    #[inline]
    fn output_layer<const NV: usize>(
        &self,
        acc: &[[std::arch::x86_64::__m512; NV]; ROWS],
        hid: &mut [f32; ROWS * 64],
        put: &mut impl FnMut(usize, usize, f32),
    ) {
        use std::arch::x86_64::*;
        let (h, n_out) = (16 * NV, self.n_out);
        // SAFETY: w3t holds n_out x h values, w3 h x n_out and b3 n_out (asserted by the
        // caller); hid is a fixed array indexed below ROWS x h.
        unsafe {
            if n_out <= 4 {
                for (r, accr) in acc.iter().enumerate() {
                    for j in 0..n_out {
                        let mut s = _mm512_setzero_ps();
                        for (v, &x) in accr.iter().enumerate() {
                            let w = _mm512_loadu_ps(self.w3t.as_ptr().add(j * h + 16 * v));
                            s = _mm512_fmadd_ps(x, w, s);
                        }
                        put(r, j, _mm512_reduce_add_ps(s) + self.b3[j]);
                    }
                }
                return;
            }
            for (r, accr) in acc.iter().enumerate() {
                for (v, &x) in accr.iter().enumerate() {
                    _mm512_storeu_ps(hid.as_mut_ptr().add(r * h + 16 * v), x);
                }
            }
            let mask: __mmask16 = ((1u32 << n_out) - 1) as __mmask16;
            let bias = _mm512_maskz_loadu_ps(mask, self.b3.as_ptr());
            let mut row = [0.0f32; 16];
            for r in 0..ROWS {
                let mut s = bias;
                for q in 0..h {
                    let w = _mm512_maskz_loadu_ps(mask, self.w3.as_ptr().add(q * n_out));
                    s = _mm512_fmadd_ps(_mm512_set1_ps(*hid.as_ptr().add(r * h + q)), w, s);
                }
                _mm512_storeu_ps(row.as_mut_ptr(), s);
                for (j, &v) in row[..n_out].iter().enumerate() {
                    put(r, j, v);
                }
            }
        }
    }

    /// The affine step of all `n` rows: the transformed values are packed (r-major,
    /// `trans` order) into `b`, mapped 16 at a time with s kept in `s`, and written
    /// back, with +-sum(s) added to each row's `logdet`. `bufs` are raw s, t, s and b,
    /// n x transformed each.
    #[target_feature(enable = "avx512f")]
    fn affine(
        &self,
        n: usize,
        d: usize,
        state: &mut [f32],
        logdet: &mut [f32],
        bufs: [&mut [f32]; 4],
    ) {
        use std::arch::x86_64::*;
        let [raw, t, s, b] = bufs;
        let db = self.trans.len();
        let m = n * db;
        for (i, row) in state[..n * d].chunks_exact(d).enumerate() {
            for (jb, &j) in self.trans.iter().enumerate() {
                b[i * db + jb] = row[j];
            }
        }
        let mut c = 0;
        while c < m {
            let mask: __mmask16 = ((1u32 << (m - c).min(16)) - 1) as __mmask16;
            // SAFETY: the masked loads and stores touch only lanes c..min(c+16, m) of
            // slices holding at least m values (asserted by the caller).
            unsafe {
                let sv = simd::clamped_tanh(
                    _mm512_maskz_loadu_ps(mask, raw.as_ptr().add(c)),
                    self.clamp,
                );
                let tv = _mm512_maskz_loadu_ps(mask, t.as_ptr().add(c));
                let bv = _mm512_maskz_loadu_ps(mask, b.as_ptr().add(c));
                let bn = if self.gen {
                    _mm512_fmadd_ps(bv, simd::exp(sv), tv)
                } else {
                    _mm512_mul_ps(
                        _mm512_sub_ps(bv, tv),
                        simd::exp(_mm512_sub_ps(_mm512_setzero_ps(), sv)),
                    )
                };
                _mm512_mask_storeu_ps(b.as_mut_ptr().add(c), mask, bn);
                _mm512_mask_storeu_ps(s.as_mut_ptr().add(c), mask, sv);
            }
            c += 16;
        }
        let sign = if self.gen { 1.0 } else { -1.0 };
        for (i, row) in state[..n * d].chunks_exact_mut(d).enumerate() {
            let mut sum = 0.0f32;
            for (jb, &j) in self.trans.iter().enumerate() {
                row[j] = b[i * db + jb];
                sum += s[i * db + jb];
            }
            logdet[i] += sign * sum;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::flow::Flow;
    use crate::spec::FlowSpec;
    use crate::tape::Tape;

    /// A SiLU flow of `dim` coordinates with every weight non-zero.
    fn flow(dim: usize, hidden: usize) -> Flow<f32> {
        let mut spec = FlowSpec::new(dim);
        spec.hidden_width = hidden;
        spec.n_layers = 6;
        spec.activation = Activation::Silu;
        let mut flow: Flow<f32> = Flow::new(spec, None, 3).unwrap();
        for (i, p) in flow.params_mut().iter_mut().enumerate() {
            *p += 0.05 * ((i * 7919 % 101) as f32 / 50.0 - 1.0);
        }
        flow
    }

    /// One generation (`gen`) or inversion of `rows` rows by a fresh tape: its output
    /// and per-row log-determinant.
    fn pass(
        flow: &Flow<f32>,
        gen: bool,
        record: bool,
        fused: bool,
        input: &[f32],
    ) -> (Vec<f32>, Vec<f32>) {
        let d = flow.dim();
        let n = input.len() / d;
        let mut tape = Tape::new(flow, n, 1);
        tape.record = record;
        tape.fused = fused;
        if gen {
            tape.state[..n * d].copy_from_slice(input);
            tape.generate(flow, n);
            (tape.xbuf[..n * d].to_vec(), tape.logdet[..n].to_vec())
        } else {
            tape.xbuf[..n * d].copy_from_slice(input);
            tape.invert(flow, n);
            (tape.state[..n * d].to_vec(), tape.logdet[..n].to_vec())
        }
    }

    /// Generation, then inversion of the result, layer by layer and fused (with or
    /// without the tape kept): [layered, fused, layered inverse, fused inverse].
    fn both_paths(flow: &Flow<f32>, record: bool, z: &[f32]) -> [(Vec<f32>, Vec<f32>); 4] {
        let layered = pass(flow, true, record, false, z);
        let fused = pass(flow, true, record, true, z);
        let layered_inv = pass(flow, false, record, false, &layered.0);
        let fused_inv = pass(flow, false, record, true, &fused.0);
        [layered, fused, layered_inv, fused_inv]
    }

    /// The gradient of the mean negative log-likelihood of the rows of `x` with respect
    /// to the parameters and to `x`, through a taped inversion and its backward pass.
    fn nll_gradient(flow: &Flow<f32>, fused: bool, x: &[f32]) -> (Vec<f32>, Vec<f32>) {
        let d = flow.dim();
        let n = x.len() / d;
        let mut tape = Tape::new(flow, n, 1);
        tape.fused = fused;
        tape.reset_written();
        tape.xbuf[..n * d].copy_from_slice(x);
        tape.invert(flow, n);
        let scale = 1.0 / n as f32;
        for (g, &z) in tape.grad[..n * d].iter_mut().zip(&tape.state[..n * d]) {
            *g = z * scale;
        }
        let mut pgrad = vec![0.0f32; flow.n_params()];
        tape.invert_backward(flow, n, scale, &mut pgrad, true);
        (pgrad, tape.gxbuf[..n * d].to_vec())
    }

    fn assert_close(what: &str, got: &[f32], want: &[f32], tol: f32) {
        for (k, (g, w)) in got.iter().zip(want).enumerate() {
            assert!(
                (g - w).abs() <= tol * (1.0 + w.abs()),
                "{what}, value {k}: fused {g}, layer by layer {w}"
            );
        }
    }

    /// Points of a flow's data space for the tests.
    fn points(rows: usize, dim: usize) -> Vec<f32> {
        (0..rows * dim)
            .map(|i| 2.5 * ((i * 37 % 29) as f32 / 14.0 - 1.0))
            .collect()
    }

    const CASES: [(usize, usize, usize); 5] = [
        (2, 64, 37),
        (2, 16, 6),
        (14, 48, 50),
        (16, 32, 13),
        (3, 64, 9),
    ];

    /// Flows with 1, 2, 7 and 8 transformed coordinates (odd splits included), widths
    /// 16 to 64, and row counts that leave a partial last block: the fused passes, with
    /// and without a tape, agree with the layer-by-layer ones and invert what they
    /// generate.
    #[test]
    fn fused_passes_agree_with_the_layer_by_layer_path() {
        if !std::is_x86_feature_detected!("avx512f") {
            eprintln!("no AVX-512F on this CPU: the fused kernel is never used");
            return;
        }
        for (dim, hidden, rows) in CASES {
            let f = flow(dim, hidden);
            assert!(f
                .layers
                .iter()
                .all(|c| applies::<f32>(c, Activation::Silu, rows)));
            let z = points(rows, dim);
            for record in [false, true] {
                let [layered, fused, layered_inv, fused_inv] = both_paths(&f, record, &z);
                let case = format!("dim {dim}, width {hidden}, {rows} rows, taped {record}");
                assert_close(&format!("{case}: x"), &fused.0, &layered.0, 1e-5);
                assert_close(&format!("{case}: log-det"), &fused.1, &layered.1, 1e-5);
                assert_close(
                    &format!("{case}: z of x"),
                    &fused_inv.0,
                    &layered_inv.0,
                    1e-5,
                );
                assert_close(
                    &format!("{case}: inverse log-det"),
                    &fused_inv.1,
                    &layered_inv.1,
                    1e-5,
                );
                assert_close(&format!("{case}: fused round trip"), &fused_inv.0, &z, 1e-5);
                let moved = fused
                    .0
                    .iter()
                    .zip(&z)
                    .filter(|(x, z)| (*x - *z).abs() > 1e-3)
                    .count();
                assert!(moved > rows, "{case}: the test flow is nearly the identity");
            }
        }
    }

    /// The backward pass reads what the fused taped forward kept: the likelihood
    /// gradients (parameters and inputs) match the layer-by-layer ones to within 1e-4 of
    /// their largest magnitude.
    #[test]
    fn gradients_through_the_fused_tape_agree() {
        if !std::is_x86_feature_detected!("avx512f") {
            return;
        }
        for (dim, hidden, rows) in CASES {
            let f = flow(dim, hidden);
            let x = points(rows, dim);
            let (pg_l, xg_l) = nll_gradient(&f, false, &x);
            let (pg_f, xg_f) = nll_gradient(&f, true, &x);
            for (what, got, want) in [("parameters", &pg_f, &pg_l), ("inputs", &xg_f, &xg_l)] {
                let scale = want.iter().fold(0.0f32, |m, v| m.max(v.abs()));
                let worst = got
                    .iter()
                    .zip(want)
                    .fold(0.0f32, |m, (a, b)| m.max((a - b).abs()));
                assert!(scale > 1e-3, "dim {dim}: vanishing {what} gradient");
                assert!(
                    worst <= 1e-4 * scale,
                    "dim {dim}, width {hidden}: {what} gradient differs by {worst} (largest {scale})"
                );
            }
        }
    }

    /// The lane functions against f64 libm on a grid over [-90, 90]: e^x within 1e-6
    /// relative for |x| < 12 (the range of s), SiLU within 1e-6 relative there, 1e-5
    /// beyond down to -80 (the rounding of x log2 e grows with |x|; the values below -12
    /// are under 1e-4) and 1e-33 absolute below, clamped tanh within 2e-7 absolute.
    #[test]
    fn lane_functions_match_libm() {
        if !std::is_x86_feature_detected!("avx512f") {
            return;
        }
        use std::arch::x86_64::*;
        let lanes = |f: &dyn Fn(__m512) -> __m512, x: &[f32; 16]| {
            let mut out = [0.0f32; 16];
            // SAFETY: AVX-512F is present (checked above); both arrays hold 16 values.
            unsafe { _mm512_storeu_ps(out.as_mut_ptr(), f(_mm512_loadu_ps(x.as_ptr()))) };
            out
        };
        let (mut worst_exp, mut worst_silu, mut worst_tanh) = (0.0f64, 0.0f64, 0.0f64);
        let mut worst_silu_tail = 0.0f64;
        let mut x = [0.0f32; 16];
        for k in 0..20_000 {
            for (l, v) in x.iter_mut().enumerate() {
                *v = -90.0 + 180.0 * (k * 16 + l) as f32 / 320_000.0;
            }
            // SAFETY (closures): AVX-512F is present (checked above).
            let e = lanes(&|v| unsafe { simd::exp(v) }, &x);
            let s = lanes(&|v| unsafe { simd::silu(v) }, &x);
            let t = lanes(&|v| unsafe { simd::clamped_tanh(v, 2.0) }, &x);
            for l in 0..16 {
                let xv = x[l] as f64;
                if xv.abs() < 12.0 {
                    worst_exp = worst_exp.max((e[l] as f64 / xv.exp() - 1.0).abs());
                }
                let want = xv / (1.0 + (-xv).exp());
                let err = (s[l] as f64 - want).abs();
                if xv.abs() < 12.0 {
                    worst_silu = worst_silu.max(err / want.abs().max(1e-30));
                } else if xv > -80.0 {
                    worst_silu_tail = worst_silu_tail.max(err / want.abs());
                } else {
                    // Below -80 the clamp of 2^t at 2^126 leaves values under 1e-33.
                    assert!(err < 1e-33, "silu({xv}) = {}, want {want}", s[l]);
                }
                worst_tanh = worst_tanh.max((t[l] as f64 - 2.0 * (xv / 2.0).tanh()).abs() / 2.0);
            }
        }
        eprintln!(
            "worst errors: exp {worst_exp:.2e}, silu {worst_silu:.2e} (beyond 12: \
             {worst_silu_tail:.2e}), tanh {worst_tanh:.2e}"
        );
        assert!(worst_exp < 1e-6, "exp: worst relative error {worst_exp}");
        assert!(worst_silu < 1e-6, "silu: worst relative error {worst_silu}");
        assert!(
            worst_silu_tail < 1e-5,
            "silu beyond |x| = 12: {worst_silu_tail}"
        );
        assert!(worst_tanh < 2e-7, "tanh: worst absolute error {worst_tanh}");
    }

    #[test]
    fn wide_outputs_and_other_activations_keep_the_layer_by_layer_path() {
        let f: Flow<f32> = Flow::new(FlowSpec::new(24), None, 3).unwrap();
        assert!(!applies::<f32>(&f.layers[0], Activation::Silu, 64));
        let f: Flow<f32> = Flow::new(FlowSpec::new(2), None, 3).unwrap();
        assert!(!applies::<f32>(&f.layers[0], Activation::Tanh, 64));
        assert!(!applies::<f32>(&f.layers[0], Activation::Silu, ROWS - 1));
        let f: Flow<f64> = Flow::new(FlowSpec::new(2), None, 3).unwrap();
        assert!(!applies::<f64>(&f.layers[0], Activation::Silu, 64));
    }

    /// A NaN in one row's input stays in that row: it reaches the row's output and
    /// log-determinant and nothing else.
    #[test]
    fn a_nan_stays_in_its_row() {
        if !std::is_x86_feature_detected!("avx512f") {
            return;
        }
        let f = flow(2, 64);
        let mut z = vec![0.5f32; 8 * 2];
        z[3 * 2] = f32::NAN;
        let [_, (x, ld), _, _] = both_paths(&f, false, &z);
        assert!(x[6..8].iter().all(|v| v.is_nan()) && ld[3].is_nan());
        let others = (0..8).filter(|&r| r != 3);
        assert!(others
            .clone()
            .all(|r| ld[r].is_finite() && x[2 * r..2 * r + 2].iter().all(|v| v.is_finite())));
    }
}
