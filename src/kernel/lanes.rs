//! Sixteen f32 lanes as a plain array, and the few fixed-order reductions the
//! kernel needs.
//!
//! The kernel loops are written over `[f32; 16]` with one straight-line
//! statement list per lane and no fused multiply-add. Compiled with AVX-512
//! each array is one zmm register, with AVX2 two ymm registers, without
//! either plain scalar or SSE code: the lanes and the order in which they are
//! summed are the same in every build, so every path produces the same bits.

pub const W: usize = 16;
pub type F = [f32; W];

/// The first `W` values of `s` (`s` must hold at least `W`).
#[inline(always)]
pub fn load(s: &[f32]) -> &F {
    s[..W].try_into().unwrap()
}

/// A partial chunk padded with `fill`.
#[inline(always)]
pub fn padded(s: &[f32], fill: f32) -> F {
    let mut v = [fill; W];
    v[..s.len()].copy_from_slice(s);
    v
}

/// The 16 lanes as f64 (exact), lanes 0..8 and 8..16, from one 512-bit
/// load.
///
/// # Safety
/// Only called from code compiled with AVX-512F, after run-time detection.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
unsafe fn widen16(v: &F) -> (std::arch::x86_64::__m512d, std::arch::x86_64::__m512d) {
    use std::arch::x86_64::*;
    // SAFETY: the load reads the 16 values of `v`; AVX-512F as the caller
    // promises.
    unsafe {
        let f = _mm512_loadu_ps(v.as_ptr());
        let lo = _mm512_cvtps_pd(_mm512_castps512_ps256(f));
        let hi = _mm512_cvtps_pd(_mm256_castpd_ps(_mm512_extractf64x4_pd::<1>(
            _mm512_castps_pd(f),
        )));
        (lo, hi)
    }
}

/// Sum of the lanes in f64 (each widened exactly) by the fixed tree of
/// `hsum64`: a block's sum loses only the rounding of its f64 additions, not
/// the 2^-24 of an f32 result. `L` is the build level (see
/// `kernel::Level`): the vector builds run the same tree with x86 shuffles,
/// which LLVM does not reliably find on its own.
#[inline(always)]
pub fn hsum_wide<const L: u8>(v: &F) -> f64 {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; the load reads `v`.
        unsafe {
            let (lo, hi) = widen16(v);
            let a = _mm512_add_pd(lo, hi);
            let b = _mm256_add_pd(_mm512_castpd512_pd256(a), _mm512_extractf64x4_pd::<1>(a));
            let c = _mm_add_pd(_mm256_castpd256_pd128(b), _mm256_extractf128_pd::<1>(b));
            return _mm_cvtsd_f64(_mm_add_sd(c, _mm_unpackhi_pd(c, c)));
        }
    }
    #[cfg(target_arch = "x86_64")]
    if L >= 1 {
        use std::arch::x86_64::*;
        // SAFETY: levels 1 and 2 are only instantiated inside functions
        // compiled with AVX2 (and AVX-512), called after run-time detection;
        // the loads read the 16 values of `v`.
        unsafe {
            let q = |k: usize| _mm256_cvtps_pd(_mm_loadu_ps(v.as_ptr().add(4 * k)));
            let (a0, a1) = (_mm256_add_pd(q(0), q(2)), _mm256_add_pd(q(1), q(3)));
            let b = _mm256_add_pd(a0, a1);
            let c = _mm_add_pd(_mm256_castpd256_pd128(b), _mm256_extractf128_pd::<1>(b));
            return _mm_cvtsd_f64(_mm_add_sd(c, _mm_unpackhi_pd(c, c)));
        }
    }
    hsum64(&v.map(|x| x as f64))
}

/// Sum of f64 lanes by a fixed pairwise tree: a_j = v_j + v_(j+8),
/// b_j = a_j + a_(j+4), then (b_0 + b_2) + (b_1 + b_3).
#[inline(always)]
pub fn hsum64(v: &[f64; W]) -> f64 {
    let mut a = [0f64; 8];
    for j in 0..8 {
        a[j] = v[j] + v[j + 8];
    }
    let mut b = [0f64; 4];
    for j in 0..4 {
        b[j] = a[j] + a[j + 4];
    }
    (b[0] + b[2]) + (b[1] + b[3])
}

/// Adds the f32 lanes into f64 lanes (exact conversions, one rounding per add).
#[inline(always)]
pub fn widen_add<const L: u8>(acc: &mut [f64; W], v: &F) {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; the loads and stores
        // stay inside `v` and `acc`. The lanes are read as one register: read
        // in four quarters, LLVM keeps a running `v` in four 128-bit
        // registers and splits every addition into it four ways.
        unsafe {
            let (lo, hi) = widen16(v);
            let a = acc.as_mut_ptr();
            _mm512_storeu_pd(a, _mm512_add_pd(_mm512_loadu_pd(a), lo));
            _mm512_storeu_pd(a.add(8), _mm512_add_pd(_mm512_loadu_pd(a.add(8)), hi));
        }
        return;
    }
    #[cfg(target_arch = "x86_64")]
    if L >= 1 {
        use std::arch::x86_64::*;
        // SAFETY: as in `hsum_wide`; the loads and stores stay inside `v` and `acc`.
        unsafe {
            for q in 0..4 {
                let f = _mm256_cvtps_pd(_mm_loadu_ps(v.as_ptr().add(4 * q)));
                let a = _mm256_loadu_pd(acc.as_ptr().add(4 * q));
                _mm256_storeu_pd(acc.as_mut_ptr().add(4 * q), _mm256_add_pd(a, f));
            }
        }
        return;
    }
    for j in 0..W {
        acc[j] += v[j] as f64;
    }
}

/// Whether |v_j| < bound in every lane (false for a NaN lane).
#[inline(always)]
pub fn all_abs_below<const L: u8>(v: &F, bound: f32) -> bool {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; the load stays inside `v`.
        unsafe {
            let a = _mm512_abs_ps(_mm512_loadu_ps(v.as_ptr()));
            return _mm512_cmp_ps_mask::<_CMP_LT_OQ>(a, _mm512_set1_ps(bound)) == 0xffff;
        }
    }
    #[cfg(target_arch = "x86_64")]
    if L >= 1 {
        use std::arch::x86_64::*;
        // SAFETY: as in `hsum_wide`.
        unsafe {
            let sign = _mm256_set1_ps(-0.0);
            let bd = _mm256_set1_ps(bound);
            let lo = _mm256_andnot_ps(sign, _mm256_loadu_ps(v.as_ptr()));
            let hi = _mm256_andnot_ps(sign, _mm256_loadu_ps(v.as_ptr().add(8)));
            let ok = _mm256_and_ps(
                _mm256_cmp_ps::<_CMP_LT_OQ>(lo, bd),
                _mm256_cmp_ps::<_CMP_LT_OQ>(hi, bd),
            );
            return _mm256_movemask_ps(ok) == 0xff;
        }
    }
    v.iter().all(|x| x.abs() < bound)
}

/// Whether every lane is below `bound` (NaN lanes are not), for lanes that
/// hold squares (+0 or more, or NaN) and a positive finite `bound`. On such
/// values the float order is the order of their bits as unsigned integers
/// (NaN's bits lie above every finite value's), and the AVX-512 build
/// compares those: Zen 4 runs that compare beside the multiply-adds, where
/// a float compare would take a turn on the multiply-add units (`llvm-mca
/// -mcpu=znver4`: 4 of the fused loop's 56 cycles of those units per 16
/// columns).
#[inline(always)]
pub fn all_below<const L: u8>(v: &F, bound: f32) -> bool {
    debug_assert!(bound > 0.0 && bound.is_finite());
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; the load stays inside `v`.
        unsafe {
            let m = _mm512_cmplt_epu32_mask(
                _mm512_castps_si512(_mm512_loadu_ps(v.as_ptr())),
                _mm512_set1_epi32(bound.to_bits() as i32),
            );
            return m == 0xffff;
        }
    }
    #[cfg(target_arch = "x86_64")]
    if L == 1 {
        use std::arch::x86_64::*;
        // SAFETY: level 1 is only instantiated inside functions compiled with
        // AVX2, called after run-time detection; loads stay inside `v`.
        unsafe {
            let bd = _mm256_set1_ps(bound);
            let ok = _mm256_and_ps(
                _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(v.as_ptr()), bd),
                _mm256_cmp_ps::<_CMP_LT_OQ>(_mm256_loadu_ps(v.as_ptr().add(8)), bd),
            );
            return _mm256_movemask_ps(ok) == 0xff;
        }
    }
    v.iter().all(|&x| x < bound)
}

/// Whether some lane of the chunks exceeds `bound` (NaN lanes do not): one
/// answer, and one branch for the caller, for all N chunks.
#[inline(always)]
pub fn any_above<const L: u8, const N: usize>(v: [&F; N], bound: f32) -> bool {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; the loads read the 16
        // values of each chunk.
        unsafe {
            let bd = _mm512_set1_ps(bound);
            let mut m: __mmask16 = 0;
            for c in v {
                m |= _mm512_cmp_ps_mask::<_CMP_GT_OQ>(_mm512_loadu_ps(c.as_ptr()), bd);
            }
            return m != 0;
        }
    }
    #[cfg(target_arch = "x86_64")]
    if L == 1 {
        use std::arch::x86_64::*;
        // SAFETY: as in `hsum_wide`.
        unsafe {
            let bd = _mm256_set1_ps(bound);
            let mut m = _mm256_setzero_ps();
            for c in v {
                for h in 0..2 {
                    let x = _mm256_loadu_ps(c.as_ptr().add(8 * h));
                    m = _mm256_or_ps(m, _mm256_cmp_ps::<_CMP_GT_OQ>(x, bd));
                }
            }
            return _mm256_movemask_ps(m) != 0;
        }
    }
    v.iter().any(|c| c.iter().any(|&x| x > bound))
}

/// Largest lane (ignores NaN lanes; order does not matter for a maximum).
#[inline(always)]
pub fn hmax(v: &F) -> f32 {
    let mut m = f32::NEG_INFINITY;
    for &x in v {
        m = if x > m { x } else { m };
    }
    m
}
