//! A branch-free single-precision exp for the hot loops.
//!
//! `f32::exp` calls libm one value at a time and blocks vectorisation. This
//! version is straight-line arithmetic (range reduction by ln 2 in two parts,
//! a degree-6 polynomial, exponent assembled from bits) that LLVM turns into
//! SIMD on every target. Relative error is about 2 ulp on the range that
//! matters; arguments below -87.3 (including -inf) give exactly 0, which the
//! kernel relies on for -inf logits. NaN propagates. The normalising pass,
//! the hottest loop, uses a table-driven form instead (`exp_table`: 16
//! entries of 2^(j/16), a three-term series, about 1 ulp).
//!
//! Everything here is plain f32/u32 arithmetic, with fused multiply-add
//! exactly where the caller asks for it, so a lane of a 16-wide AVX-512 loop,
//! of an 8-wide AVX2 loop and of the scalar fallback compute the same bits
//! when they agree on fusing.

const LOG2E: f32 = std::f32::consts::LOG2_E;
// ln 2 split so that n * LN2_HI is exact for |n| < 2^9 (Cody and Waite's method, common practice).
// LN2_HI is exactly 355/512, written out in full.
#[allow(clippy::excessive_precision)]
const LN2_HI: f32 = 0.693_359_375;
const LN2_LO: f32 = -2.121_944_4e-4;
// Minimax-style coefficients for exp on [-ln2/2, ln2/2] (the classic single-precision set).
const P0: f32 = 1.987_569_1e-4;
const P1: f32 = 1.398_199_9e-3;
const P2: f32 = 8.333_452e-3;
const P3: f32 = 4.166_579_6e-2;
const P4: f32 = 1.666_666_5e-1;
// The set's last coefficient, 5.0000001e-1, is 0.5 once rounded to f32.
const P5: f32 = 0.5;
/// 1.5 * 2^23: adding it rounds to an integer, which then sits in the low
/// mantissa bits of the sum.
const ROUND: f32 = 12_582_912.0;

// The normalising pass's form (`exp_table`): exp(x) = 2^n 2^(j/16) e^r with
// k = round(16 x / ln 2), n = floor(k / 16), j = k mod 16 and
// |r| <= ln 2 / 32, where three terms of e^r's series are exact to 1e-8
// (Tang's table-driven method, common practice). Two multiply-adds fewer
// than the polynomial form; the table entry is a lane permute.
const T_LOG2E: f32 = 16.0 * std::f32::consts::LOG2_E;
// n * T_LN2_HI stays exact for |k| < 2^15 (T_LN2_HI = LN2_HI / 16 keeps its 9 bits).
const T_LN2_HI: f32 = LN2_HI / 16.0;
const T_LN2_LO: f32 = LN2_LO / 16.0;
const Q2: f32 = 0.5;
const Q3: f32 = 1.0 / 6.0;
/// The bits of ROUND: tt's bits minus these are the integer k.
const ROUND_BITS: i32 = 0x4B40_0000;
/// 2^(j/16) rounded to f32 (checked against f64 `powf` in the tests).
const EXP2_FRAC: [f32; 16] = [
    1.0,
    1.044_273_7,
    1.090_507_7,
    1.138_788_6,
    1.189_207_1,
    1.241_857_8,
    1.296_839_6,
    1.354_255_6,
    std::f32::consts::SQRT_2,
    1.476_826_2,
    1.542_210_8,
    1.610_490_3,
    1.681_792_9,
    1.756_252_2,
    1.834_008_1,
    1.915_206_6,
];

/// The vector loops' table: the bits of 2^(j/16) less j << 19, so that adding
/// tt's bits shifted left by 19 gives the bits of 2^(j/16) 2^n in one integer
/// addition. tt's bits are ROUND_BITS + k with k = 16 n + j; shifted by 19,
/// ROUND_BITS leaves no bits and k gives (n << 23) + (j << 19): n in the
/// exponent field, j's part cancelled by the entry. One shift fewer than
/// taking n = k >> 4 first (`exp_step`; both vector builds). The values are
/// never used as numbers, only permuted and added to as integers.
static EXP2_ENTRY: [f32; 16] = {
    let mut a = [0f32; 16];
    let mut j = 0;
    while j < 16 {
        a[j] = f32::from_bits(EXP2_FRAC[j].to_bits().wrapping_sub((j as u32) << 19));
        j += 1;
    }
    a
};

pub const EXP_UNDERFLOW: f32 = -87.3;
const EXP_CLAMP_HI: f32 = 88.3;

/// Whether code built for level `L` (see `kernel::Level`: 0 scalar, 1 AVX2,
/// 2 AVX-512) fuses multiply-adds: the vector levels always do; the scalar
/// build only where the compile target guarantees the instruction (else
/// `mul_add` would be a slow library call).
#[inline(always)]
pub const fn fused(level: u8) -> bool {
    level > 0
        || cfg!(any(
            target_arch = "aarch64",
            all(target_arch = "x86_64", target_feature = "fma")
        ))
}

/// a * b + c, with one rounding where level `L` fuses, else two.
#[inline(always)]
pub fn mul_add<const L: u8>(a: f32, b: f32, c: f32) -> f32 {
    if fused(L) {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

/// exp(x) for x <= 0 (the kernel's x - max), -inf and NaN: no clamping, as
/// x in [-87.3, 0] keeps 2^n a normal number, and the final select sends
/// everything below to exactly 0 (the garbage that very negative arguments
/// produce on the way never escapes). The polynomial is evaluated by
/// Estrin's scheme (shorter dependency chains than Horner's).
#[inline(always)]
pub fn exp_nonpos<const L: u8>(x: f32) -> f32 {
    let t = mul_add::<L>(x, LOG2E, ROUND);
    let n = t - ROUND;
    let r = if fused(L) {
        mul_add::<L>(n, -LN2_LO, mul_add::<L>(n, -LN2_HI, x))
    } else {
        (x - n * LN2_HI) - n * LN2_LO
    };
    let r2 = r * r;
    let a = mul_add::<L>(P0, r, P1);
    let b = mul_add::<L>(P2, r, P3);
    let c = mul_add::<L>(P4, r, P5);
    let y = mul_add::<L>(mul_add::<L>(a, r2, b), r2, c);
    let y = mul_add::<L>(y, r2, r) + 1.0;
    // 2^n from the bits of t: its low 9 bits hold n modulo 512, and n lies in
    // [-126, 0] here, so ((n + 127) mod 512) << 23 is the biased exponent. A
    // float-to-int conversion would be a saturating cast in Rust, which LLVM
    // does not vectorise.
    let scale = f32::from_bits((t.to_bits() << 23).wrapping_add(127 << 23));
    let v = y * scale;
    if x < EXP_UNDERFLOW {
        0.0
    } else {
        v
    }
}

/// exp(x) for x <= 0, -inf and NaN by the table-driven form (see
/// `EXP2_FRAC`); the same contract as `exp_nonpos`, and what the normalising
/// pass (`exp_step`) computes lane for lane at every level.
#[inline(always)]
pub fn exp_table<const L: u8>(x: f32) -> f32 {
    let tt = mul_add::<L>(x, T_LOG2E, ROUND);
    let kf = tt - ROUND;
    let r = if fused(L) {
        mul_add::<L>(kf, -T_LN2_LO, mul_add::<L>(kf, -T_LN2_HI, x))
    } else {
        (x - kf * T_LN2_HI) - kf * T_LN2_LO
    };
    // e^r - 1 = r + r^2 (1/2 + r/6), so the last step adds it to the table
    // entry with one rounding; r^2 beside the inner term keeps the chain short.
    let em1 = mul_add::<L>(r * r, mul_add::<L>(r, Q3, Q2), r);
    let k = (tt.to_bits() as i32).wrapping_sub(ROUND_BITS);
    // 2^n with n = floor(k / 16) >= -126 for x >= -87.3: a normal number, so
    // the entry times it is exact.
    let scale = f32::from_bits(((k >> 4) + 127).wrapping_shl(23) as u32);
    let ts = EXP2_FRAC[(k & 15) as usize] * scale;
    let v = mul_add::<L>(ts, em1, ts);
    if x < EXP_UNDERFLOW {
        0.0
    } else {
        v
    }
}

/// The constants of `exp_table8`, as whole registers.
///
/// Built from splat constants, LLVM keeps them as constants and, short of
/// registers in an unrolled loop, reloads them with `vbroadcastss` at every
/// use: on Zen 3 that is a shuffle-pipe operation, on the pipes the table
/// permutes and the bf16 widening already need. Read through `black_box`,
/// they are plain values: kept in registers or spilled and reloaded as
/// ordinary loads, which take no vector pipe.
#[cfg(target_arch = "x86_64")]
#[derive(Clone, Copy)]
pub struct ExpK8 {
    log2e: std::arch::x86_64::__m256,
    round: std::arch::x86_64::__m256,
    ln2_hi: std::arch::x86_64::__m256,
    ln2_lo: std::arch::x86_64::__m256,
    q3: std::arch::x86_64::__m256,
    q2: std::arch::x86_64::__m256,
    t_lo: std::arch::x86_64::__m256,
    t_hi: std::arch::x86_64::__m256,
    under: std::arch::x86_64::__m256,
}

#[cfg(target_arch = "x86_64")]
impl ExpK8 {
    /// # Safety
    /// Only called from code compiled with AVX2, after run-time detection.
    #[inline(always)]
    pub unsafe fn new() -> ExpK8 {
        use std::arch::x86_64::*;
        let c: [[f32; 8]; 9] = std::hint::black_box([
            [T_LOG2E; 8],
            [ROUND; 8],
            [-T_LN2_HI; 8],
            [-T_LN2_LO; 8],
            [Q3; 8],
            [Q2; 8],
            EXP2_ENTRY[..8].try_into().unwrap(),
            EXP2_ENTRY[8..].try_into().unwrap(),
            [EXP_UNDERFLOW; 8],
        ]);
        // SAFETY: loads of the arrays above; AVX as the caller promises.
        let l = |i: usize| unsafe { _mm256_loadu_ps(c[i].as_ptr()) };
        ExpK8 {
            log2e: l(0),
            round: l(1),
            ln2_hi: l(2),
            ln2_lo: l(3),
            q3: l(4),
            q2: l(5),
            t_lo: l(6),
            t_hi: l(7),
            under: l(8),
        }
    }
}

/// `exp_table` of eight lanes on AVX2 (x = c - m <= 0), and the mask of the
/// lanes at or above the underflow bound (NaN lanes included): the lanes
/// whose (c - m) e the normalising pass adds to its t sum. The table entry
/// is two 8-entry permutes and a blend.
///
/// # Safety
/// Only called from code compiled with AVX2 and FMA, after run-time detection.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
pub unsafe fn exp_table8(
    x: std::arch::x86_64::__m256,
    k: &ExpK8,
) -> (std::arch::x86_64::__m256, std::arch::x86_64::__m256) {
    use std::arch::x86_64::*;
    // SAFETY: the caller runs with AVX2 and FMA.
    unsafe {
        let tt = _mm256_fmadd_ps(x, k.log2e, k.round);
        let kf = _mm256_sub_ps(tt, k.round);
        let r = _mm256_fmadd_ps(kf, k.ln2_lo, _mm256_fmadd_ps(kf, k.ln2_hi, x));
        let em1 = _mm256_fmadd_ps(_mm256_mul_ps(r, r), _mm256_fmadd_ps(r, k.q3, k.q2), r);
        // The entry: two 8-entry permutes, chosen by bit 3 of k.
        let ti = _mm256_castps_si256(tt);
        let lo = _mm256_permutevar8x32_ps(k.t_lo, ti);
        let hi = _mm256_permutevar8x32_ps(k.t_hi, ti);
        let tb = _mm256_blendv_ps(lo, hi, _mm256_castsi256_ps(_mm256_slli_epi32::<28>(ti)));
        // Times 2^n, n = floor(k / 16) >= -126: the entry 2^(j/16) (in
        // [1, 2)) with n added to its exponent field, exactly the product
        // (see `EXP2_ENTRY`).
        let ts = _mm256_castsi256_ps(_mm256_add_epi32(
            _mm256_castps_si256(tb),
            _mm256_slli_epi32::<19>(ti),
        ));
        let v = _mm256_fmadd_ps(ts, em1, ts);
        let keep = _mm256_cmp_ps::<_CMP_NLT_UQ>(x, k.under);
        (_mm256_and_ps(v, keep), keep)
    }
}

/// One step of the normalising pass over 16 lanes: e = exp(c - m) (as
/// `exp_table`), s += e, and t += (c - m) e where c - m >= EXP_UNDERFLOW.
/// The vector builds are written with intrinsics: the table entry is a lane
/// permute (one 16-entry `vpermps` on AVX-512, two 8-entry ones and a blend
/// on AVX2), both builds add n to the entry's exponent field, and the
/// underflow lanes are masked; every other operation is the same, so the
/// lanes are the same bits. (AVX-512 used `vscalefps`, also exact, after
/// an int-to-float conversion; the integer form is one vector operation
/// fewer per 16 lanes and measured `normalise_store` 1.055x faster.)
#[inline(always)]
pub fn exp_step<const L: u8>(
    c: &[f32; 16],
    m: f32,
    s: &mut [f32; 16],
    t: &mut [f32; 16],
) -> [f32; 16] {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled
        // with AVX-512F, called after run-time detection; loads and stores
        // stay inside the arrays.
        unsafe {
            let k = _mm512_set1_ps;
            let x = _mm512_sub_ps(_mm512_loadu_ps(c.as_ptr()), k(m));
            let tt = _mm512_fmadd_ps(x, k(T_LOG2E), k(ROUND));
            let kf = _mm512_sub_ps(tt, k(ROUND));
            let r = _mm512_fmadd_ps(kf, k(-T_LN2_LO), _mm512_fmadd_ps(kf, k(-T_LN2_HI), x));
            let em1 = _mm512_fmadd_ps(_mm512_mul_ps(r, r), _mm512_fmadd_ps(r, k(Q3), k(Q2)), r);
            // The entry: a permute by the low 4 bits of tt (k mod 16).
            let ti = _mm512_castps_si512(tt);
            let tb = _mm512_permutexvar_ps(ti, _mm512_loadu_ps(EXP2_ENTRY.as_ptr()));
            // Times 2^n as on AVX2 (`exp_table8`): n added to the entry's
            // exponent field (see `EXP2_ENTRY`), exactly the product for the
            // lanes kept.
            let ts = _mm512_castsi512_ps(_mm512_add_epi32(
                _mm512_castps_si512(tb),
                _mm512_slli_epi32::<19>(ti),
            ));
            // Lanes with x < EXP_UNDERFLOW are zeroed and add no t; NaN lanes are kept.
            let keep = _mm512_cmp_ps_mask::<_CMP_NLT_UQ>(x, k(EXP_UNDERFLOW));
            let e = _mm512_maskz_fmadd_ps(keep, ts, em1, ts);
            _mm512_storeu_ps(
                s.as_mut_ptr(),
                _mm512_add_ps(_mm512_loadu_ps(s.as_ptr()), e),
            );
            _mm512_storeu_ps(
                t.as_mut_ptr(),
                _mm512_mask3_fmadd_ps(x, e, _mm512_loadu_ps(t.as_ptr()), keep),
            );
            let mut out = [0f32; 16];
            _mm512_storeu_ps(out.as_mut_ptr(), e);
            return out;
        }
    }
    #[cfg(target_arch = "x86_64")]
    if L == 1 {
        use std::arch::x86_64::*;
        // SAFETY: level 1 is only instantiated inside functions compiled
        // with AVX2 and FMA, called after run-time detection; loads and
        // stores stay inside the arrays. Eight lanes at a time keep the
        // constants and temporaries inside the 16 ymm registers; the
        // arithmetic is `exp_table::<1>` lane for lane.
        unsafe {
            let mut out = [0f32; 16];
            let k = ExpK8::new();
            for h in 0..2 {
                let x = _mm256_sub_ps(_mm256_loadu_ps(c.as_ptr().add(8 * h)), _mm256_set1_ps(m));
                let (e, keep) = exp_table8(x, &k);
                let sp = s.as_mut_ptr().add(8 * h);
                _mm256_storeu_ps(sp, _mm256_add_ps(_mm256_loadu_ps(sp), e));
                let tp = t.as_mut_ptr().add(8 * h);
                let to = _mm256_loadu_ps(tp);
                _mm256_storeu_ps(tp, _mm256_blendv_ps(to, _mm256_fmadd_ps(x, e, to), keep));
                _mm256_storeu_ps(out.as_mut_ptr().add(8 * h), e);
            }
            return out;
        }
    }
    let mut out = [0f32; 16];
    for j in 0..16 {
        let a = c[j] - m;
        let v = exp_table::<L>(a);
        s[j] += v;
        // Below the underflow bound v = 0 and the term is skipped, which
        // also keeps -inf * 0 from making a NaN.
        t[j] = if a < EXP_UNDERFLOW {
            t[j]
        } else {
            mul_add::<L>(a, v, t[j])
        };
        out[j] = v;
    }
    out
}

/// exp(x) for any x (clamped to [-87.3, 88.3] first; below -87.3 gives 0).
#[inline(always)]
pub fn exp_f32(x: f32) -> f32 {
    exp_clamped::<0>(x)
}

/// `exp_f32` built for kernel level `L` (fused multiply-adds where `L` fuses).
#[inline(always)]
pub fn exp_clamped<const L: u8>(x: f32) -> f32 {
    // Written as compare-and-select so that NaN passes through both clamps.
    // n up to 127 keeps (n + 127) inside the exponent field, so the bit
    // construction in `exp_nonpos` holds for positive arguments up to 88.3.
    let xc = if x > EXP_CLAMP_HI { EXP_CLAMP_HI } else { x };
    exp_nonpos::<L>(xc)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_f64_exp_to_a_few_ulp() {
        // Reference: the platform libm exp in f64, rounded to f32.
        let mut worst = 0f64;
        let mut x = -87.0f32;
        while x < 88.0 {
            let got = exp_f32(x) as f64;
            let want = (x as f64).exp();
            let rel = ((got - want) / want).abs();
            worst = worst.max(rel);
            x += 0.0137;
        }
        assert!(
            worst < 4.0 * f32::EPSILON as f64,
            "worst relative error {worst}"
        );
    }

    /// The worst relative error of `f` against libm's f64 exp (the
    /// reference) over every `stride`-th f32 in [-87.3, 0], the arguments
    /// x - max that the kernel sees.
    fn worst_on_softmax_range(f: impl Fn(f32) -> f32, stride: u32) -> f64 {
        let mut worst = 0f64;
        let mut bits = EXP_UNDERFLOW.to_bits();
        let end = (-1e-30f32).to_bits();
        while bits > end {
            let x = f32::from_bits(bits);
            let want = (x as f64).exp();
            worst = worst.max(((f(x) as f64 - want) / want).abs());
            bits -= stride;
        }
        worst
    }

    #[test]
    fn dense_sweep_of_the_softmax_range() {
        // Every 61st f32, fused and unfused: a few ulp.
        let eps = f32::EPSILON as f64;
        let w = worst_on_softmax_range(exp_nonpos::<0>, 61);
        assert!(w < 4.0 * eps, "scalar build: worst relative error {w}");
        let w = worst_on_softmax_range(exp_nonpos::<2>, 61);
        assert!(w < 4.0 * eps, "fused: worst relative error {w}");
    }

    #[test]
    fn vector_entries_give_the_scaled_powers_of_two() {
        // The integer identity the vector loops rely on, for every j and
        // every n the normalising pass meets (n = floor(k / 16) in [-126, 0]):
        // entry bits + (tt bits << 19) = bits of 2^(j/16) * 2^n.
        for n in -126i32..=0 {
            for j in 0..16i32 {
                let k = 16 * n + j;
                let tt_bits = (ROUND_BITS + k) as u32;
                let got =
                    f32::from_bits(EXP2_ENTRY[j as usize].to_bits().wrapping_add(tt_bits << 19));
                let want = EXP2_FRAC[j as usize] * 2f32.powi(n);
                assert_eq!(got.to_bits(), want.to_bits(), "j {j}, n {n}");
            }
        }
    }

    #[test]
    fn table_entries_are_powers_of_two_rounded_to_f32() {
        // 2^(j/16) in f64 (libm pow, common practice), rounded once to f32.
        for (j, &v) in EXP2_FRAC.iter().enumerate() {
            assert_eq!(v, 2f64.powf(j as f64 / 16.0) as f32, "entry {j}");
        }
    }

    #[test]
    fn table_form_dense_sweep_of_the_softmax_range() {
        // `exp_table` on every 37th f32: held to 2 ulp fused, 3 unfused.
        let eps = f32::EPSILON as f64;
        let w = worst_on_softmax_range(exp_table::<0>, 37);
        assert!(w < 3.0 * eps, "scalar build: worst relative error {w}");
        let w = worst_on_softmax_range(exp_table::<2>, 37);
        assert!(w < 2.0 * eps, "fused: worst relative error {w}");
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn table8_of(x: &[f32; 8]) -> [f32; 8] {
        use std::arch::x86_64::*;
        let mut out = [0f32; 8];
        // SAFETY: the caller checked AVX2 and FMA; loads and stores of the arrays.
        unsafe {
            let k = ExpK8::new();
            let (e, _) = exp_table8(_mm256_loadu_ps(x.as_ptr()), &k);
            _mm256_storeu_ps(out.as_mut_ptr(), e);
        }
        out
    }

    #[test]
    #[cfg(target_arch = "x86_64")]
    fn table8_gives_the_scalar_table_bits() {
        // The AVX2 form puts 2^n into the entry's exponent field instead of
        // multiplying by it: the same bits wherever the product is exact,
        // which this checks on every 97th f32 of [-87.3, 0] and the edges.
        if !(is_x86_feature_detected!("avx2") && is_x86_feature_detected!("fma")) {
            return;
        }
        let mut xs: Vec<f32> = vec![
            0.0,
            -0.0,
            EXP_UNDERFLOW,
            -87.29,
            -87.31,
            -1e30,
            f32::NEG_INFINITY,
        ];
        let mut bits = EXP_UNDERFLOW.to_bits();
        while bits > (-1e-30f32).to_bits() {
            xs.push(f32::from_bits(bits));
            bits -= 97;
        }
        xs.resize(xs.len().div_ceil(8) * 8, -1.0);
        for c in xs.chunks_exact(8) {
            let c: &[f32; 8] = c.try_into().unwrap();
            // SAFETY: AVX2 and FMA were detected above.
            let got = unsafe { table8_of(c) };
            for (x, g) in c.iter().zip(got) {
                assert_eq!(g.to_bits(), exp_table::<1>(*x).to_bits(), "x = {x}");
            }
        }
    }

    #[test]
    fn nonpositive_special_values() {
        for fused in [false, true] {
            for table in [false, true] {
                let e = |x: f32| match (fused, table) {
                    (true, false) => exp_nonpos::<2>(x),
                    (false, false) => exp_nonpos::<0>(x),
                    (true, true) => exp_table::<2>(x),
                    (false, true) => exp_table::<0>(x),
                };
                assert_eq!(e(f32::NEG_INFINITY), 0.0);
                assert_eq!(e(-1e30), 0.0);
                assert_eq!(e(-87.31), 0.0);
                assert!(e(-87.29) > 0.0);
                assert_eq!(e(0.0), 1.0);
                assert_eq!(e(-0.0), 1.0);
                assert!(e(f32::NAN).is_nan());
                assert!(e(-1e-30) == 1.0);
            }
        }
    }

    #[test]
    fn special_values() {
        assert_eq!(exp_f32(f32::NEG_INFINITY), 0.0);
        assert_eq!(exp_f32(-100.0), 0.0);
        assert_eq!(exp_f32(-87.31), 0.0);
        assert!(exp_f32(-87.29) > 0.0);
        assert_eq!(exp_f32(0.0), 1.0);
        assert_eq!(exp_f32(-0.0), 1.0);
        assert!(exp_f32(f32::NAN).is_nan());
    }
}
