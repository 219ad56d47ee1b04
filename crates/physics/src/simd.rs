//! Lane-batched arithmetic helpers shared by the hot kernels (Lennard-Jones pairs, φ⁴
//! sites, the peak-flops probe).
//!
//! The kernels process [`LANES`] configurations at once, one per SIMD lane, so that every
//! inner loop is an element-wise loop over a fixed-size array that LLVM vectorises
//! without reassociating any floating-point sum: per-configuration results are computed
//! in exactly the same order as a scalar loop would. Each kernel is compiled three
//! times (baseline SSE2, AVX2+FMA, AVX-512) and the widest one the CPU supports is
//! chosen at run time; the FMA variants round fused multiply-adds once, so results
//! differ from the baseline in the last bits (still deterministic on one machine).

/// Configurations per SIMD block: eight f64 fill one AVX-512 register.
pub const LANES: usize = 8;

/// One f64 per lane.
pub type Lanes = [f64; LANES];

/// a·b + c, fused when the kernel is compiled with FMA (`FMA = true`).
#[inline(always)]
pub fn fma<const FMA: bool>(a: f64, b: f64, c: f64) -> f64 {
    if FMA {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

/// Which instruction-set level the kernels use on this CPU.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SimdLevel {
    /// SSE2 only (every x86-64, and every other architecture).
    Baseline,
    /// AVX2 with fused multiply-add.
    Avx2Fma,
    /// AVX-512F (with AVX2 and FMA).
    Avx512,
}

impl SimdLevel {
    /// A short name for benchmark rows.
    pub fn name(self) -> &'static str {
        match self {
            SimdLevel::Baseline => "baseline",
            SimdLevel::Avx2Fma => "avx2+fma",
            SimdLevel::Avx512 => "avx512f",
        }
    }
}

/// The widest level this CPU supports (detected once by the standard library).
pub fn simd_level() -> SimdLevel {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx512f")
            && std::is_x86_feature_detected!("avx2")
            && std::is_x86_feature_detected!("fma")
        {
            return SimdLevel::Avx512;
        }
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            return SimdLevel::Avx2Fma;
        }
    }
    SimdLevel::Baseline
}

/// Defines a function that runs an `#[inline(always)]` generic kernel under the widest
/// target features the CPU supports. `$kernel::<FMA>` must take the listed arguments.
macro_rules! dispatch_kernel {
    ($vis:vis fn $name:ident($($arg:ident : $ty:ty),*) -> $ret:ty => $kernel:ident) => {
        $vis fn $name($($arg: $ty),*) -> $ret {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx2,fma")]
                unsafe fn wide($($arg: $ty),*) -> $ret {
                    $kernel::<true>($($arg),*)
                }
                #[target_feature(enable = "avx2,fma")]
                unsafe fn avx2($($arg: $ty),*) -> $ret {
                    $kernel::<true>($($arg),*)
                }
                match $crate::simd::simd_level() {
                    // SAFETY: the CPU was checked to support these target features.
                    $crate::simd::SimdLevel::Avx512 => return unsafe { wide($($arg),*) },
                    // SAFETY: as above.
                    $crate::simd::SimdLevel::Avx2Fma => return unsafe { avx2($($arg),*) },
                    $crate::simd::SimdLevel::Baseline => {}
                }
            }
            $kernel::<false>($($arg),*)
        }
    };
}
pub(crate) use dispatch_kernel;
