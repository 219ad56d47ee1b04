//! The scalar types the flow is generic over (f32 for production, f64 for gradient
//! checks), the single GEMM entry point, and the element-wise kernels of the hot loops.
//!
//! Element-wise kernels are written once, generically, and run inside a function
//! compiled with AVX-512 or AVX2 enabled when the CPU has it (chosen at run time), so
//! that LLVM vectorises them without the crate demanding `-C target-cpu=native`. The f32
//! exponential is a branch-free polynomial (relative error about 2e-7) because libm's
//! scalar call would dominate the small configurations; the f64 path keeps the exact
//! libm functions so that finite-difference checks measure the derivation, not an
//! approximation.

use crate::spec::Activation;
use std::fmt::Debug;
use std::ops::{AddAssign, MulAssign, SubAssign};

/// A floating-point type the flow can run in.
pub trait Real:
    num_traits::Float + Default + Debug + Send + Sync + AddAssign + SubAssign + MulAssign + 'static
{
    /// The safetensors dtype name of this type (`F32` or `F64`).
    const DTYPE_NAME: &'static str;

    /// Converts from f64 (rounding for f32).
    fn of(v: f64) -> Self;

    /// Converts to f64 exactly.
    fn to64(self) -> f64;

    /// The exponential used in hot loops: fast and vectorisable for f32, exact for f64.
    fn fexp(self) -> Self;
}

impl Real for f32 {
    const DTYPE_NAME: &'static str = "F32";
    #[inline(always)]
    fn of(v: f64) -> Self {
        v as f32
    }
    #[inline(always)]
    fn to64(self) -> f64 {
        self as f64
    }
    #[inline(always)]
    fn fexp(self) -> Self {
        exp_f32(self)
    }
}

impl Real for f64 {
    const DTYPE_NAME: &'static str = "F64";
    #[inline(always)]
    fn of(v: f64) -> Self {
        v
    }
    #[inline(always)]
    fn to64(self) -> f64 {
        self
    }
    #[inline(always)]
    fn fexp(self) -> Self {
        self.exp()
    }
}

/// A branch-free single-precision exponential: range reduction by ln 2 (split into a
/// high and a low part) and a degree-6 Taylor polynomial on |r| <= ln2/2, whose
/// truncation error (r^7/7!) is about 1.2e-7 relative. Inputs are clamped to
/// [-87, 88] so the exponent bits never overflow.
#[inline(always)]
pub fn exp_f32(x: f32) -> f32 {
    const LOG2E: f32 = std::f32::consts::LOG2_E;
    const LN2_HI: f32 = 0.693_145_75;
    const LN2_LO: f32 = 1.428_606_8e-6;
    const ROUND: f32 = 12_582_912.0; // 1.5 * 2^23: adding it rounds to an integer.
    let x = x.clamp(-87.0, 88.0);
    let shifted = x.mul_add(LOG2E, ROUND);
    let n = shifted - ROUND;
    // Fused multiply-adds (single instructions in the AVX2/AVX-512 copies).
    let r = (-n).mul_add(LN2_LO, (-n).mul_add(LN2_HI, x));
    let mut p = 1.0f32 / 720.0;
    p = p.mul_add(r, 1.0 / 120.0);
    p = p.mul_add(r, 1.0 / 24.0);
    p = p.mul_add(r, 1.0 / 6.0);
    p = p.mul_add(r, 0.5);
    p = p.mul_add(r, 1.0);
    p = p.mul_add(r, 1.0);

    // The integer n sits in the low mantissa bits of `shifted`; integer arithmetic on
    // the bit patterns (unlike a saturating float-to-int cast) vectorises.
    let n_bits = shifted.to_bits().wrapping_sub(ROUND.to_bits());
    let bits = n_bits.wrapping_add(127) << 23;
    p * f32::from_bits(bits)
}

/// Whether the CPU has every feature the AVX-512 copy of a `multiversion!` function is
/// compiled with (`avx512f,avx512vl,avx512dq,avx2,fma`): a CPU with AVX-512F alone
/// (Knights Landing has F without VL and DQ) must not run it.
#[cfg(target_arch = "x86_64")]
pub(crate) fn has_avx512_v4() -> bool {
    std::is_x86_feature_detected!("avx512f")
        && std::is_x86_feature_detected!("avx512vl")
        && std::is_x86_feature_detected!("avx512dq")
        && std::is_x86_feature_detected!("avx2")
        && std::is_x86_feature_detected!("fma")
}

/// Defines `pub(crate) fn $name<T: Real>(args)` that runs the `#[inline(always)]`
/// function `$inner` inside a copy compiled for AVX-512 or AVX2+FMA when the CPU has it
/// (checked at run time, a cached flag), so that generic element-wise loops are
/// vectorised for that ISA without `-C target-cpu=native`.
macro_rules! multiversion {
    ($(#[$m:meta])* fn $name:ident<$T:ident>($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? = $inner:ident;) => {
        $(#[$m])*
        #[allow(clippy::too_many_arguments)]
        pub(crate) fn $name<$T: $crate::real::Real>($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx512vl,avx512dq,avx2,fma")]
                #[allow(clippy::too_many_arguments)]
                unsafe fn v4<$T: $crate::real::Real>($($arg: $ty),*) $(-> $ret)? {
                    $inner::<$T>($($arg),*)
                }
                #[target_feature(enable = "avx2,fma")]
                #[allow(clippy::too_many_arguments)]
                unsafe fn v3<$T: $crate::real::Real>($($arg: $ty),*) $(-> $ret)? {
                    $inner::<$T>($($arg),*)
                }
                if $crate::real::has_avx512_v4() {
                    // SAFETY: the CPU supports every feature `v4` enables (AVX-512F,
                    // VL and DQ, AVX2, FMA; checked just above).
                    return unsafe { v4::<$T>($($arg),*) };
                }
                if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                    // SAFETY: the CPU supports AVX2 and FMA (checked just above).
                    return unsafe { v3::<$T>($($arg),*) };
                }
            }
            $inner::<$T>($($arg),*)
        }
    };
}
pub(crate) use multiversion;

/// `c = a * b` (or `c += a * b` when `accumulate`), on `threads` threads of the current
/// rayon pool when `threads > 1`, all row-major with the given row
/// strides; `a_t`/`b_t` read `a`/`b` transposed. Dimensions: op(a) is m x k, op(b) is
/// k x n, c is m x n. Bounds are checked before the unsafe call; a violation is a bug
/// in this crate, never reachable from user input, hence the panic.
#[allow(clippy::too_many_arguments)]
pub(crate) fn matmul<T: Real>(
    m: usize,
    n: usize,
    k: usize,
    a: &[T],
    a_t: bool,
    b: &[T],
    b_t: bool,
    c: &mut [T],
    accumulate: bool,
    threads: usize,
) {
    if m == 0 || n == 0 {
        return;
    }
    if k == 0 {
        if !accumulate {
            c[..m * n].fill(T::zero());
        }
        return;
    }
    assert!(a.len() >= m * k && b.len() >= k * n && c.len() >= m * n);
    // Row-major op(a): element (i, p) at i*rs + p*cs.
    let (a_rs, a_cs) = if a_t {
        (1, m as isize)
    } else {
        (k as isize, 1)
    };
    let (b_rs, b_cs) = if b_t {
        (1, k as isize)
    } else {
        (n as isize, 1)
    };
    // SAFETY: the strides address only elements below m*k, k*n and m*n, and the
    // lengths were asserted above; the slices do not alias (one is &mut).
    unsafe {
        gemm::gemm(
            m,
            n,
            k,
            c.as_mut_ptr(),
            1,
            n as isize,
            accumulate,
            a.as_ptr(),
            a_cs,
            a_rs,
            b.as_ptr(),
            b_cs,
            b_rs,
            T::one(),
            T::one(),
            false,
            false,
            false,
            if threads > 1 {
                gemm::Parallelism::Rayon(threads)
            } else {
                gemm::Parallelism::None
            },
        );
    }
}

/// Largest inner, outer or row dimension that `matmul_thin` handles itself.
const THIN: usize = 8;

/// `matmul` with a fast path for thin products (a dimension of at most 8, as in the
/// first and last layers of a narrow conditioner), where a general GEMM spends most of
/// its time on packing and edge handling. `scratch` holds small transposed copies; it
/// grows once and is then reused, so steady-state calls do not allocate.
#[allow(clippy::too_many_arguments)]
pub(crate) fn matmul_s<T: Real>(
    m: usize,
    n: usize,
    k: usize,
    a: &[T],
    a_t: bool,
    b: &[T],
    b_t: bool,
    c: &mut [T],
    accumulate: bool,
    threads: usize,
    scratch: &mut Vec<T>,
) {
    let thin = k > 0 && (k <= THIN || n <= THIN || m <= THIN);
    if threads == 1 && !thin && !a_t && !accumulate && narrow::applies::<T>(m, n, k) {
        // SAFETY: `applies` checked that T is f32 and the CPU has AVX-512F; the lengths
        // are checked inside.
        let (a32, c32) = unsafe { (narrow::as_f32(a), narrow::as_f32_mut(c)) };
        if b_t {
            transpose_into(n, k, b, scratch);
            unsafe { narrow::product(m, n, k, a32, false, narrow::as_f32(scratch), c32, false) };
        } else {
            unsafe { narrow::product(m, n, k, a32, false, narrow::as_f32(b), c32, false) };
        }
        return;
    }
    if threads == 1 && !thin && a_t && !b_t && narrow::applies::<T>(m, n, 0) {
        // SAFETY: as above.
        let (a32, b32, c32) =
            unsafe { (narrow::as_f32(a), narrow::as_f32(b), narrow::as_f32_mut(c)) };
        unsafe { narrow::product(m, n, k, a32, true, b32, c32, accumulate) };
        return;
    }
    if threads > 1 || !thin || (a_t && b_t) {
        return matmul(m, n, k, a, a_t, b, b_t, c, accumulate, threads);
    }
    assert!(a.len() >= m * k && b.len() >= k * n && c.len() >= m * n);
    if !accumulate {
        c[..m * n].fill(T::zero());
    }
    if !a_t && k <= THIN {
        // c_i += sum_p a[i,p] * opB[p,:], with opB's rows contiguous.
        let rows: &[T] = if b_t {
            transpose_into(n, k, b, scratch);
            scratch
        } else {
            b
        };
        thin_k(m, n, k, a, rows, c);
    } else if !a_t && n <= THIN {
        // c[i,j] += dot(a_i, opB[:,j]), with opB's columns contiguous.
        let cols: &[T] = if b_t {
            b
        } else {
            transpose_into(k, n, b, scratch);
            scratch
        };
        thin_n(m, n, k, a, cols, c);
    } else if a_t && m <= THIN {
        // a is stored k x m: c_i += sum_r a[r,i] * b[r,:].
        thin_m_at(m, n, k, a, b, c);
    } else if a_t && n <= THIN {
        // a is stored k x m, b is k x n: c^T accumulates rows of a, then is added to c.
        scratch.clear();
        scratch.resize(n * m, T::zero());
        thin_n_at(m, n, k, a, b, scratch);
        for i in 0..m {
            for j in 0..n {
                c[i * n + j] += scratch[j * m + i];
            }
        }
    } else {
        matmul(m, n, k, a, a_t, b, b_t, c, true, threads);
    }
}

/// An explicit AVX-512 kernel for c = a b with b at most 64 columns wide (a multiple of
/// 16) and k <= 512, as in a narrow conditioner's hidden layers: six rows of c stay in
/// 24 registers while b's rows stream from L1. On this machine it ran 5-15% faster than
/// the general GEMM for 1024 x 64 x 64, whose packing dominates at that size.
pub(crate) mod narrow {
    use super::Real;
    use std::any::TypeId;

    /// Whether `product` handles this product on this CPU for this scalar type (`k` is
    /// its inner dimension; the transposed form, which streams its inner dimension, is
    /// asked with k = 0).
    pub(super) fn applies<T: Real>(m: usize, n: usize, k: usize) -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            TypeId::of::<T>() == TypeId::of::<f32>()
                && n.is_multiple_of(16)
                && (16..=64).contains(&n)
                && k <= 512
                && m >= 6
                && std::is_x86_feature_detected!("avx512f")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            let _ = (m, n, k);
            false
        }
    }

    /// Reinterprets a slice of `T` as f32.
    ///
    /// # Safety
    /// `T` must be f32.
    pub(crate) unsafe fn as_f32<T: Real>(x: &[T]) -> &[f32] {
        debug_assert!(TypeId::of::<T>() == TypeId::of::<f32>());
        unsafe { std::slice::from_raw_parts(x.as_ptr() as *const f32, x.len()) }
    }

    /// Reinterprets a mutable slice of `T` as f32.
    ///
    /// # Safety
    /// `T` must be f32.
    pub(crate) unsafe fn as_f32_mut<T: Real>(x: &mut [T]) -> &mut [f32] {
        debug_assert!(TypeId::of::<T>() == TypeId::of::<f32>());
        unsafe { std::slice::from_raw_parts_mut(x.as_mut_ptr() as *mut f32, x.len()) }
    }

    /// c (m x n) = op(a) b, or c += op(a) b when `accumulate`, all row-major, where
    /// op(a) is a (m x k) or, when `a_t`, the transpose of a stored k x m (the weight
    /// gradient of a dense layer, input^T g).
    ///
    /// # Safety
    /// The CPU must support AVX-512F and `applies` must hold for (m, n, k), with k = 0
    /// when `a_t` (that form streams its inner dimension).
    #[cfg(target_arch = "x86_64")]
    #[allow(clippy::too_many_arguments)]
    pub(super) unsafe fn product(
        m: usize,
        n: usize,
        k: usize,
        a: &[f32],
        a_t: bool,
        b: &[f32],
        c: &mut [f32],
        accumulate: bool,
    ) {
        assert!(a.len() >= m * k && b.len() >= k * n && c.len() >= m * n);
        // Element (i, p) of op(a) sits at a[i * rs + p * cs].
        let st = if a_t { (1, m) } else { (k, 1) };
        unsafe {
            match n / 16 {
                1 => rows::<1>(m, k, a, st, b, c, accumulate),
                2 => rows::<2>(m, k, a, st, b, c, accumulate),
                3 => rows::<3>(m, k, a, st, b, c, accumulate),
                _ => rows::<4>(m, k, a, st, b, c, accumulate),
            }
        }
    }

    #[cfg(not(target_arch = "x86_64"))]
    #[allow(clippy::too_many_arguments)]
    pub(super) unsafe fn product(
        _: usize,
        _: usize,
        _: usize,
        _: &[f32],
        _: bool,
        _: &[f32],
        _: &mut [f32],
        _: bool,
    ) {
        unreachable!("applies() is false off x86_64")
    }

    /// c = op(a) b (or c += op(a) b when `accumulate`) for c of m x 16 NV, with element
    /// (i, p) of op(a) at `a[i * a_rs + p * a_cs]`. Six rows of c stay in 24 registers
    /// while b's rows stream past; a last block that would run past m overlaps the one
    /// before (m >= 6) and writes only its new rows.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn rows<const NV: usize>(
        m: usize,
        k: usize,
        a: &[f32],
        (a_rs, a_cs): (usize, usize),
        b: &[f32],
        c: &mut [f32],
        accumulate: bool,
    ) {
        use std::arch::x86_64::*;
        const R: usize = 6;
        let n = 16 * NV;
        let (ap, bp, cp) = (a.as_ptr(), b.as_ptr(), c.as_mut_ptr());
        let mut i = 0;
        while i < m {
            let i0 = if i + R <= m { i } else { m - R };
            // SAFETY (whole block): offsets stay below m*k, k*n and m*n (asserted by
            // the callers); rows i0..i0+R of c exist since m >= R.
            unsafe {
                let mut acc = [[_mm512_setzero_ps(); NV]; R];
                for p in 0..k {
                    let mut w = [_mm512_setzero_ps(); NV];
                    for (v, wv) in w.iter_mut().enumerate() {
                        *wv = _mm512_loadu_ps(bp.add(p * n + 16 * v));
                    }
                    for (r, accr) in acc.iter_mut().enumerate() {
                        let s = _mm512_set1_ps(*ap.add((i0 + r) * a_rs + p * a_cs));
                        for v in 0..NV {
                            accr[v] = _mm512_fmadd_ps(s, w[v], accr[v]);
                        }
                    }
                }
                for (r, accr) in acc.iter().enumerate().skip(i - i0) {
                    for (v, &x) in accr.iter().enumerate() {
                        let dst = cp.add((i0 + r) * n + 16 * v);
                        let x = if accumulate {
                            _mm512_add_ps(_mm512_loadu_ps(dst), x)
                        } else {
                            x
                        };
                        _mm512_storeu_ps(dst, x);
                    }
                }
            }
            i = i0 + R;
        }
    }
}

/// Writes the transpose of the `rows` x `cols` row-major matrix `x` into `out`.
fn transpose_into<T: Real>(rows: usize, cols: usize, x: &[T], out: &mut Vec<T>) {
    out.clear();
    out.resize(rows * cols, T::zero());
    for r in 0..rows {
        for q in 0..cols {
            out[q * rows + r] = x[r * cols + q];
        }
    }
}

multiversion! {
    /// c (m x n) += a (m x k) * b (k x n) for small k: one scaled row of b per term.
    fn thin_k<T>(m: usize, n: usize, k: usize, a: &[T], b: &[T], c: &mut [T]) = thin_k_k;
}

#[inline(always)]
fn thin_k_k<T: Real>(m: usize, n: usize, k: usize, a: &[T], b: &[T], c: &mut [T]) {
    for i in 0..m {
        let crow = &mut c[i * n..(i + 1) * n];
        for p in 0..k {
            let s = a[i * k + p];
            for (cv, &bv) in crow.iter_mut().zip(&b[p * n..(p + 1) * n]) {
                *cv += s * bv;
            }
        }
    }
}

multiversion! {
    /// c (m x n) += a (m x k) * bt^T for small n, bt (n x k) holding b's columns: dot
    /// products summed in 16 fixed lanes (vectorised and reproducible).
    fn thin_n<T>(m: usize, n: usize, k: usize, a: &[T], bt: &[T], c: &mut [T]) = thin_n_k;
}

#[inline(always)]
fn thin_n_k<T: Real>(m: usize, n: usize, k: usize, a: &[T], bt: &[T], c: &mut [T]) {
    for i in 0..m {
        let arow = &a[i * k..(i + 1) * k];
        for j in 0..n {
            let brow = &bt[j * k..(j + 1) * k];
            let mut lanes = [T::zero(); 16];
            let mut ac = arow.chunks_exact(16);
            let mut bc = brow.chunks_exact(16);
            for (x, y) in (&mut ac).zip(&mut bc) {
                for l in 0..16 {
                    lanes[l] += x[l] * y[l];
                }
            }
            let mut sum = T::zero();
            for (x, y) in ac.remainder().iter().zip(bc.remainder()) {
                sum += *x * *y;
            }
            for l in lanes {
                sum += l;
            }
            c[i * n + j] += sum;
        }
    }
}

multiversion! {
    /// c (m x n) += a^T b for small m, a stored k x m, b stored k x n.
    fn thin_m_at<T>(m: usize, n: usize, k: usize, a: &[T], b: &[T], c: &mut [T]) = thin_m_at_k;
}

#[inline(always)]
fn thin_m_at_k<T: Real>(m: usize, n: usize, k: usize, a: &[T], b: &[T], c: &mut [T]) {
    for r in 0..k {
        let brow = &b[r * n..(r + 1) * n];
        for i in 0..m {
            let s = a[r * m + i];
            for (cv, &bv) in c[i * n..(i + 1) * n].iter_mut().zip(brow) {
                *cv += s * bv;
            }
        }
    }
}

multiversion! {
    /// ct (n x m) += b^T a for small n, a stored k x m, b stored k x n (so ct = (a^T b)^T).
    fn thin_n_at<T>(m: usize, n: usize, k: usize, a: &[T], b: &[T], ct: &mut [T]) = thin_n_at_k;
}

#[inline(always)]
fn thin_n_at_k<T: Real>(m: usize, n: usize, k: usize, a: &[T], b: &[T], ct: &mut [T]) {
    for r in 0..k {
        let arow = &a[r * m..(r + 1) * m];
        for j in 0..n {
            let s = b[r * n + j];
            for (cv, &av) in ct[j * m..(j + 1) * m].iter_mut().zip(arow) {
                *cv += s * av;
            }
        }
    }
}

multiversion! {
    /// Adds `bias` to every row of `buf` (`rows` x `bias.len()`), then applies `act` in
    /// place, keeping in `aux` what the backward pass needs (the sigmoid for SiLU; an
    /// empty `aux` keeps nothing).
    fn bias_act_forward<T>(act: Option<Activation>, rows: usize, bias: &[T], buf: &mut [T], aux: &mut [T]) = bias_act_forward_k;
}

#[inline(always)]
fn bias_act_forward_k<T: Real>(
    act: Option<Activation>,
    rows: usize,
    bias: &[T],
    buf: &mut [T],
    aux: &mut [T],
) {
    let cols = bias.len();
    for i in 0..rows {
        let row = &mut buf[i * cols..(i + 1) * cols];
        match act {
            None => {
                for (v, &b) in row.iter_mut().zip(bias) {
                    *v += b;
                }
            }
            Some(Activation::Silu) if aux.is_empty() => {
                for (v, &b) in row.iter_mut().zip(bias) {
                    let p = *v + b;
                    *v = p / (T::one() + (-p).fexp());
                }
            }
            Some(Activation::Silu) => {
                let arow = &mut aux[i * cols..(i + 1) * cols];
                for ((v, a), &b) in row.iter_mut().zip(arow.iter_mut()).zip(bias) {
                    let p = *v + b;
                    let sig = T::one() / (T::one() + (-p).fexp());
                    *a = sig;
                    *v = p * sig;
                }
            }
            Some(Activation::Tanh) => {
                for (v, &b) in row.iter_mut().zip(bias) {
                    *v = tanh_fast(*v + b);
                }
            }
            Some(Activation::Relu) => {
                for (v, &b) in row.iter_mut().zip(bias) {
                    let p = *v + b;
                    *v = if p > T::zero() { p } else { T::zero() };
                }
            }
        }
    }
}

multiversion! {
    /// Turns the gradient with respect to an activation's output into the gradient with
    /// respect to its input, in place: `grad *= act'(pre)`, from the stored output `post`
    /// (and sigmoid `aux` for SiLU: d/dp [p s(p)] = s + h (1 - s) with h = p s).
    fn act_backward<T>(act: Activation, post: &[T], aux: &[T], grad: &mut [T]) = act_backward_k;
}

#[inline(always)]
fn act_backward_k<T: Real>(act: Activation, post: &[T], aux: &[T], grad: &mut [T]) {
    match act {
        Activation::Silu => {
            for ((g, &h), &s) in grad.iter_mut().zip(post).zip(aux) {
                *g *= s + h * (T::one() - s);
            }
        }
        Activation::Tanh => {
            for (g, &h) in grad.iter_mut().zip(post) {
                *g *= T::one() - h * h;
            }
        }
        Activation::Relu => {
            for (g, &h) in grad.iter_mut().zip(post) {
                if h <= T::zero() {
                    *g = T::zero();
                }
            }
        }
    }
}

multiversion! {
    /// Adds the column sums of `g` (`rows` x `acc.len()`) to `acc` (a bias gradient).
    fn add_col_sums<T>(rows: usize, g: &[T], acc: &mut [T]) = add_col_sums_k;
}

#[inline(always)]
fn add_col_sums_k<T: Real>(rows: usize, g: &[T], acc: &mut [T]) {
    let cols = acc.len();
    for i in 0..rows {
        for (a, &v) in acc.iter_mut().zip(&g[i * cols..(i + 1) * cols]) {
            *a += v;
        }
    }
}

multiversion! {
    /// `acc[i] += x[i]` element-wise.
    fn add_assign<T>(acc: &mut [T], x: &[T]) = add_assign_k;
}

#[inline(always)]
fn add_assign_k<T: Real>(acc: &mut [T], x: &[T]) {
    for (a, &v) in acc.iter_mut().zip(x) {
        *a += v;
    }
}

/// tanh through the fast exponential: 1 - 2 / (1 + e^{2x}). Its absolute error near
/// zero (about 1e-7 in f32) is harmless here because forward and inverse passes use the
/// same function, so invertibility is unaffected.
#[inline(always)]
pub(crate) fn tanh_fast<T: Real>(x: T) -> T {
    let two = T::one() + T::one();
    if T::DTYPE_NAME == "F64" {
        x.tanh()
    } else {
        T::one() - two / (T::one() + (two * x).fexp())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fast_exp_matches_libm() {
        let mut worst = 0.0f64;
        let mut x = -80.0f32;
        while x < 80.0 {
            let rel = ((exp_f32(x) as f64) - (x as f64).exp()).abs() / (x as f64).exp();
            worst = worst.max(rel);
            x += 0.0137;
        }
        assert!(worst < 5e-7, "worst relative error {worst}");
    }

    #[test]
    fn thin_paths_agree_with_the_general_product() {
        let mut scratch = Vec::new();
        for &(m, n, k) in &[
            (37, 64, 1),
            (37, 2, 64),
            (2, 40, 33),
            (40, 3, 50),
            (5, 5, 5),
            (64, 1, 9),
        ] {
            for (a_t, b_t) in [(false, false), (false, true), (true, false)] {
                let a: Vec<f64> = (0..m * k).map(|i| (i as f64 * 0.71).sin()).collect();
                let b: Vec<f64> = (0..k * n).map(|i| (i as f64 * 0.13).cos()).collect();
                let mut want = vec![0.5; m * n];
                let mut got = want.clone();
                matmul(m, n, k, &a, a_t, &b, b_t, &mut want, true, 1);
                matmul_s(m, n, k, &a, a_t, &b, b_t, &mut got, true, 1, &mut scratch);
                let err = want
                    .iter()
                    .zip(&got)
                    .map(|(x, y)| (x - y).abs())
                    .fold(0.0, f64::max);
                assert!(err < 1e-12, "{m}x{n}x{k} a_t={a_t} b_t={b_t}: {err}");
                matmul_s(m, n, k, &a, a_t, &b, b_t, &mut got, false, 1, &mut scratch);
                matmul(m, n, k, &a, a_t, &b, b_t, &mut want, false, 1);
                let err = want
                    .iter()
                    .zip(&got)
                    .map(|(x, y)| (x - y).abs())
                    .fold(0.0, f64::max);
                assert!(
                    err < 1e-12,
                    "overwrite {m}x{n}x{k} a_t={a_t} b_t={b_t}: {err}"
                );
            }
        }
    }

    /// The AVX-512 narrow kernel (plain, with b transposed, and with a transposed,
    /// overwriting and accumulating) against the general GEMM, on shapes with a partial
    /// last block of rows.
    #[test]
    fn narrow_kernel_agrees_with_the_general_product() {
        let mut scratch = Vec::new();
        let forms = [
            (false, false, false),
            (false, true, false),
            (true, false, false),
            (true, false, true),
        ];
        for &(m, n, k) in &[
            (1024, 64, 64),
            (64, 64, 1024),
            (13, 48, 70),
            (6, 16, 9),
            (250, 32, 300),
        ] {
            for (a_t, b_t, accumulate) in forms {
                let a: Vec<f32> = (0..m * k)
                    .map(|i| ((i * 7) % 19) as f32 * 0.1 - 0.9)
                    .collect();
                let b: Vec<f32> = (0..k * n)
                    .map(|i| ((i * 5) % 23) as f32 * 0.05 - 0.5)
                    .collect();
                let start: Vec<f32> = (0..m * n).map(|i| (i % 11) as f32 - 5.0).collect();
                let (mut want, mut got) = (start.clone(), start.clone());
                matmul(m, n, k, &a, a_t, &b, b_t, &mut want, accumulate, 1);
                matmul_s(
                    m,
                    n,
                    k,
                    &a,
                    a_t,
                    &b,
                    b_t,
                    &mut got,
                    accumulate,
                    1,
                    &mut scratch,
                );
                let err = want
                    .iter()
                    .zip(&got)
                    .map(|(x, y)| (x - y).abs() / (1.0 + x.abs()))
                    .fold(0.0, f32::max);
                assert!(
                    err < 1e-5,
                    "{m}x{n}x{k} a_t={a_t} b_t={b_t} accumulate={accumulate}: {err}"
                );
            }
        }
    }

    #[test]
    fn matmul_transposes_agree_with_naive_product() {
        let (m, n, k) = (5, 7, 3);
        let a: Vec<f64> = (0..m * k).map(|i| (i as f64 * 0.37).sin()).collect();
        let b: Vec<f64> = (0..k * n).map(|i| (i as f64 * 0.11).cos()).collect();
        let mut want = vec![0.0; m * n];
        for i in 0..m {
            for j in 0..n {
                for p in 0..k {
                    want[i * n + j] += a[i * k + p] * b[p * n + j];
                }
            }
        }
        let mut c = vec![0.0; m * n];
        matmul(m, n, k, &a, false, &b, false, &mut c, false, 1);
        assert!(c.iter().zip(&want).all(|(x, y)| (x - y).abs() < 1e-12));
        // Transposed storage of a (k x m) and b (n x k).
        let mut at = vec![0.0; m * k];
        for i in 0..m {
            for p in 0..k {
                at[p * m + i] = a[i * k + p];
            }
        }
        let mut bt = vec![0.0; k * n];
        for p in 0..k {
            for j in 0..n {
                bt[j * k + p] = b[p * n + j];
            }
        }
        let mut c2 = vec![1.0; m * n];
        matmul(m, n, k, &at, true, &bt, true, &mut c2, true, 1);
        assert!(c2
            .iter()
            .zip(&want)
            .all(|(x, y)| (x - 1.0 - y).abs() < 1e-12));
    }

    /// Every CPU feature a `#[target_feature(enable = ...)]` in this crate turns on is
    /// checked at run time by some guard in the same file: an unchecked feature (the
    /// AVX-512 copy of `multiversion!` once enabled VL and DQ behind a check of F alone)
    /// is an illegal instruction on a CPU without it.
    #[test]
    fn every_enabled_cpu_feature_is_detected_before_use() {
        for (file, text) in [
            ("real.rs", include_str!("real.rs")),
            ("fused.rs", include_str!("fused.rs")),
        ] {
            let enabled = quoted_after(text, "#[target_feature(enable = ");
            let detected = quoted_after(text, "is_x86_feature_detected!(");
            assert!(!enabled.is_empty(), "{file}: no target_feature found");
            for list in &enabled {
                for feature in list.split(',') {
                    assert!(
                        detected.iter().any(|d| d == feature),
                        "{file}: `{feature}` is enabled but never detected"
                    );
                }
            }
        }
    }

    /// The feature-list literals that directly follow each occurrence of `prefix`.
    fn quoted_after(text: &str, prefix: &str) -> Vec<String> {
        text.match_indices(prefix)
            .filter_map(|(i, _)| {
                let rest = text[i + prefix.len()..].strip_prefix('"')?;
                Some(rest[..rest.find('"')?].to_string())
            })
            // A feature list is plain words; this test's own source mentions the
            // prefixes too, followed by other text.
            .filter(|s| !s.is_empty() && s.chars().all(|c| c.is_ascii_alphanumeric() || c == ','))
            .collect()
    }
}
