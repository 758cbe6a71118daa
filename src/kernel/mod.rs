//! The per-row math: the hot kernel.
//!
//! For each reference row we find the maximum, the log-sum-exp and the
//! entropy, keeping exp(x - max) of every column (`normalise_store`); the same
//! for each candidate row; then one fused pass over both rows and both stored
//! exponentials (`compare_stored`) gives KL in both directions and the total
//! variation without another exp. A row costs one exp per column and file.
//!
//! Everything runs on 16 f32 lanes (see `lanes`) in fixed blocks whose partial
//! sums are carried in f64, so a 256k-column row loses no precision to
//! accumulation, and the summation order depends only on the row, never on
//! the thread that ran it or on the instruction set: the AVX-512, AVX2 and
//! scalar builds of each function give the same bits (tested).
//!
//! KL uses SPEC's cancellation-free form: with d = log p - log q,
//! KL(p||q) = sum p * g(d) with g(d) = d + e^-d - 1 >= 0. For |d| < 0.5 g is
//! evaluated by its Taylor series, which keeps full relative precision for the
//! 1e-7-nat rows that good quantisations produce; beyond it the direct form
//! p*d + q - p has no cancellation to speak of. The difference d itself is
//! taken from the raw logits (x - y, exact when they are close) plus one
//! constant computed in f64, not from two rounded log-probabilities.

#[cfg(target_arch = "x86_64")]
mod avx2;
pub mod buf;
pub mod exp;
pub mod lanes;
pub mod row;

use exp::{exp_step, mul_add};
use lanes::{
    all_abs_below, all_below, any_above, hmax, hsum64, hsum_wide, load, padded, widen_add, F, W,
};
pub use row::Row;
use row::{with_src, Src};
use std::sync::atomic::{AtomicU8, Ordering};

// Tests run the generic level-1 loops beside `avx2`'s on the same rows and
// compare the bits; this switch, per test thread, turns the AVX2 loops off.
#[cfg(test)]
thread_local! {
    static GENERIC_AVX2: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

/// Whether the AVX2 build runs the loops of `avx2` (always, outside tests).
#[inline(always)]
fn avx2_loops() -> bool {
    #[cfg(test)]
    {
        !GENERIC_AVX2.with(|c| c.get())
    }
    #[cfg(not(test))]
    {
        true
    }
}

/// Columns per partial-sum block of the normalising and the fused pass;
/// also the block granularity the sampler walks (see `estimators`). Each
/// block's 16 f32 lane sums are reduced to one f64 sum (`lanes::hsum_wide`):
/// 256 columns where it was 64 took 4% to 7% off each pass on AVX-512 (the
/// per-block reductions and bookkeeping were that much of a pass), 8% to 24%
/// on AVX2, and with the reduction in f64 instead of f32 the row's sum is more
/// accurate than before, not less (a 4,096-column row of KL 2.5e-11 nats:
/// 6e-7 relative error where it was 3e-5).
pub const NORM_BLOCK: usize = 256;
/// Columns whose partial sums the pair pass carries in f32 lanes.
const PAIR_BLOCK: usize = 256;
// A total variation folded into a fused pass is summed per NORM_BLOCK block,
// the pass on its own per PAIR_BLOCK: the same bits only while they agree.
const _: () = assert!(PAIR_BLOCK == NORM_BLOCK);
const NEG_INF: f32 = f32::NEG_INFINITY;

/// What makes a row unusable (SPEC: skipped, counted and listed).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RowFault {
    Nan,
    PosInf,
    AllNegInf,
}

impl RowFault {
    pub fn describe(self) -> &'static str {
        match self {
            RowFault::Nan => "NaN logit",
            RowFault::PosInf => "+inf logit",
            RowFault::AllNegInf => "every logit is -inf",
        }
    }
}

/// Summary of one row's log-softmax.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RowNorm {
    pub max: f32,
    /// Lowest column holding the maximum (SPEC: ties go to the lowest id).
    pub argmax: u32,
    /// log sum exp(x), so log p_i = x_i - lse.
    pub lse: f64,
    /// Sum of exp(x - max), the normaliser relative to the maximum.
    pub sum: f64,
    pub entropy: f64,
}

/// Per-row results of the fused pair pass.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct PairMetrics {
    pub kl: f64,
    pub kl_reverse: f64,
    /// Clamped to [0, 1], as the divergences are clamped at 0: where the
    /// rows hardly overlap, rounding carried the sum 1.4e-10 past 1 (found
    /// by the randomized search in the tests).
    pub tv: f64,
}

/// Bytes that a pass pulls toward the cache while it runs, spread evenly
/// over its blocks: the input the same thread reads next (the engine picks
/// it; empty for none). A pass that is busy computing hides the memory's
/// latency of the next row this way, where the hardware's own prefetcher
/// only starts on the row once the next pass misses on it. Only hints:
/// nothing is read, and an address that is not mapped is passed over.
#[derive(Debug, Clone, Copy, Default)]
pub struct Ahead<'a>(pub &'a [u8]);

impl Ahead<'_> {
    pub const NONE: Ahead<'static> = Ahead(&[]);

    /// Cache-line size assumed (x86-64's).
    const LINE: usize = 64;

    /// Offsets of the bytes block `b` (of `nb`) asks for: len / nb rounded
    /// up to whole lines per block, so the blocks cover every line of the
    /// bytes once, in order, and nothing past them.
    #[inline(always)]
    fn share(len: usize, b: usize, nb: usize) -> std::ops::Range<usize> {
        if len == 0 || nb == 0 {
            return 0..0;
        }
        let per = len.div_ceil(nb).next_multiple_of(Self::LINE);
        (b * per).min(len)..((b + 1) * per).min(len)
    }

    /// Asks for block `b`'s share of the bytes (see `share`).
    #[inline(always)]
    fn block(self, b: usize, nb: usize) {
        let r = Self::share(self.0.len(), b, nb);
        let mut at = r.start;
        while at < r.end {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: `at` < len, inside the slice; a prefetch reads nothing
            // and cannot fault.
            unsafe {
                use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
                _mm_prefetch::<_MM_HINT_T0>(self.0.as_ptr().add(at) as *const i8);
            }
            at += Self::LINE;
        }
    }
}

// ---------------------------------------------------------------------------
// Instruction-set levels and run-time dispatch.

/// The instruction sets a kernel function can be compiled for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Level {
    Scalar = 1,
    Avx2 = 2,
    Avx512 = 3,
}

impl Level {
    pub fn name(self) -> &'static str {
        match self {
            Level::Scalar => "scalar",
            Level::Avx2 => "avx2",
            Level::Avx512 => "avx512",
        }
    }
    fn from_u8(v: u8) -> Level {
        match v {
            3 => Level::Avx512,
            2 => Level::Avx2,
            _ => Level::Scalar,
        }
    }
}

/// The best level this CPU runs.
pub fn detected_level() -> Level {
    static CACHE: AtomicU8 = AtomicU8::new(0);
    let c = CACHE.load(Ordering::Relaxed);
    if c != 0 {
        return Level::from_u8(c);
    }
    #[allow(unused_mut)]
    let mut l = Level::Scalar;
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::is_x86_feature_detected as has;
        if has!("avx2") && has!("fma") && has!("bmi1") && has!("bmi2") && has!("f16c") {
            l = Level::Avx2;
            if has!("avx512f") && has!("avx512bw") && has!("avx512dq") && has!("avx512vl") {
                l = Level::Avx512;
            }
        }
    }
    CACHE.store(l as u8, Ordering::Relaxed);
    l
}

/// The level the kernel uses: the detected one, or a lower one named by the
/// environment variable `KLGAUGE_SIMD` (`scalar`, `avx2`, `avx512`), for
/// benchmarks and for checking one path against another.
pub fn level() -> Level {
    static CACHE: AtomicU8 = AtomicU8::new(0);
    let c = CACHE.load(Ordering::Relaxed);
    if c != 0 {
        return Level::from_u8(c);
    }
    let best = detected_level();
    let want = match std::env::var("KLGAUGE_SIMD").as_deref() {
        Ok("scalar") => Level::Scalar,
        Ok("avx2") => Level::Avx2,
        _ => best,
    };
    let l = want.min(best);
    CACHE.store(l as u8, Ordering::Relaxed);
    l
}

// The same source compiled once per level, chosen per call by a cached CPU
// feature check. Implementations take `const L: u8` (0 scalar, 1 AVX2,
// 2 AVX-512), which selects fused multiply-adds (`exp::fused`) and the
// horizontal sums (`lanes`). With the lane layout fixed, builds that agree on
// fusing give the same bits (tested).
macro_rules! dispatched {
    ($(#[$m:meta])* pub fn $name:ident / $at:ident ($($a:ident: $t:ty),*) -> $r:ty => $imp:ident) => {
        $(#[$m])*
        #[inline]
        #[allow(clippy::too_many_arguments)]
        pub fn $name($($a: $t),*) -> $r {
            $at(level(), $($a),*)
        }

        /// The same computed at a given level; a level the CPU lacks runs
        /// the best one it has below it.
        #[allow(clippy::too_many_arguments)]
        pub fn $at(level: Level, $($a: $t),*) -> $r {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx512bw,avx512dq,avx512vl,avx2,fma,bmi1,bmi2,f16c")]
                unsafe fn wide512($($a: $t),*) -> $r {
                    $imp::<2>($($a),*)
                }
                #[target_feature(enable = "avx2,fma,bmi1,bmi2,f16c")]
                unsafe fn wide256($($a: $t),*) -> $r {
                    $imp::<1>($($a),*)
                }
                let level = level.min(detected_level());
                if level == Level::Avx512 {
                    // SAFETY: the features were detected at run time.
                    return unsafe { wide512($($a),*) };
                }
                if level == Level::Avx2 {
                    // SAFETY: as above.
                    return unsafe { wide256($($a),*) };
                }
            }
            let _ = level;
            $imp::<0>($($a),*)
        }
    };
}

/// Whether the scalar build fuses multiply-adds like the vector builds (see
/// `exp::fused`); where it does not, it differs from them in the last bits,
/// never in accuracy.
pub const SCALAR_FMA: bool = exp::fused(0);

// ---------------------------------------------------------------------------
// Decoding stored values.

/// Widens a stored row into `out` (as many columns as `out` holds).
#[inline(always)]
fn decode_src<const L: u8, S: Src>(x: S, out: &mut [f32]) {
    assert!(x.len() >= out.len(), "decode: byte count");
    let n = out.len();
    let mut i = 0;
    while i + W <= n {
        out[i..i + W].copy_from_slice(&unsafe { x.chunk::<L>(i) });
        i += W;
    }
    for (j, o) in out.iter_mut().enumerate().skip(i) {
        *o = x.at(j);
    }
}

#[inline(always)]
fn decode_bf16_impl<const L: u8>(bytes: &[u8], out: &mut [f32]) {
    assert_eq!(bytes.len(), 2 * out.len(), "decode: byte count");
    decode_src::<L, _>(row::Bf16Le(bytes), out)
}

#[inline(always)]
fn decode_f16_impl<const L: u8>(bytes: &[u8], out: &mut [f32]) {
    assert_eq!(bytes.len(), 2 * out.len(), "decode: byte count");
    decode_src::<L, _>(row::F16Le(bytes), out)
}

#[inline(always)]
fn decode_f32_impl<const L: u8>(bytes: &[u8], out: &mut [f32]) {
    assert_eq!(bytes.len(), 4 * out.len(), "decode: byte count");
    decode_src::<L, _>(row::F32Le(bytes), out)
}

#[inline(always)]
fn decode_impl<const L: u8>(x: Row, out: &mut [f32]) {
    with_src!(x, s => decode_src::<L, _>(s, out))
}

dispatched! {
    /// The first `out.len()` columns of a stored row, widened to f32.
    pub fn decode / decode_at(x: Row, out: &mut [f32]) -> () => decode_impl
}

dispatched! {
    /// Little-endian bf16 values (any alignment) to f32.
    pub fn decode_bf16 / decode_bf16_at(bytes: &[u8], out: &mut [f32]) -> () => decode_bf16_impl
}

dispatched! {
    /// Little-endian IEEE f16 values (any alignment) to f32, exactly.
    pub fn decode_f16 / decode_f16_at(bytes: &[u8], out: &mut [f32]) -> () => decode_f16_impl
}

dispatched! {
    /// Little-endian f32 values at any alignment.
    pub fn decode_f32 / decode_f32_at(bytes: &[u8], out: &mut [f32]) -> () => decode_f32_impl
}

// ---------------------------------------------------------------------------
// Normalising one row.

/// The largest value of a row, NaN passed over (-inf for a row with no
/// other values), and the first column of the SEG-column segment in which
/// the running maximum first reached it: the row's first column holding the
/// maximum is in that segment or after it. Four independent running maxima
/// (chunk i goes to number i mod 4), so the compare-and-select chains
/// overlap; they are separate variables so that they stay in registers.
#[inline(always)]
fn row_max<const L: u8, S: Src>(x: S) -> (f32, usize) {
    #[inline(always)]
    fn step(c: &F, m: &mut F) {
        for j in 0..W {
            // maxps: the new value only where it is greater (not NaN).
            m[j] = if c[j] > m[j] { c[j] } else { m[j] };
        }
    }
    /// Columns per segment: one check of the four maxima per segment.
    const SEG: usize = 2048;
    let (mut m0, mut m1, mut m2, mut m3) = ([NEG_INF; W], [NEG_INF; W], [NEG_INF; W], [NEG_INF; W]);
    let n = x.len();
    let mut i = 0usize;
    let mut rise = Rise::NEW;
    // SAFETY (every chunk below): i + 16 <= n where a whole chunk is read.
    while i + 4 * W <= n {
        step(&unsafe { x.chunk::<L>(i) }, &mut m0);
        step(&unsafe { x.chunk::<L>(i + W) }, &mut m1);
        step(&unsafe { x.chunk::<L>(i + 2 * W) }, &mut m2);
        step(&unsafe { x.chunk::<L>(i + 3 * W) }, &mut m3);
        i += 4 * W;
        if i - rise.start == SEG {
            rise.check::<L, 4>([&m0, &m1, &m2, &m3], i);
        }
    }
    while i + W <= n {
        step(&unsafe { x.chunk::<L>(i) }, &mut m0);
        i += W;
    }
    if i < n {
        step(&x.padded(i, n, NEG_INF), &mut m1);
    }
    let all = [&m0, &m1, &m2, &m3];
    rise.check::<L, 4>(all, n);
    (hmax_of(all), rise.from)
}

/// The largest lane of N (NaN lanes passed over).
#[inline(always)]
fn hmax_of<const N: usize>(m: [&F; N]) -> f32 {
    let mut mx = NEG_INF;
    for m in m {
        let h = hmax(m);
        mx = if h > mx { h } else { mx };
    }
    mx
}

/// Where a pass's running maximum last rose, checked at the end of each
/// span of columns: the row's first column holding its maximum is at
/// `from` or after it, so the search for it (`first_equal`) starts there.
/// Used by the maximum scan and, for the candidate, the fused pass.
#[derive(Clone, Copy)]
struct Rise {
    best: f32,
    from: usize,
    /// Where the span being walked began.
    start: usize,
}

impl Rise {
    const NEW: Rise = Rise {
        best: NEG_INF,
        from: 0,
        start: 0,
    };

    /// The span ends at column `at` with running lane maxima `m`. The
    /// maximum rises in a few spans of a row: one compare of the lanes with
    /// the best so far, and the reduction only where it rose (reducing at
    /// every carry of the fused pass measured 0.905x).
    #[inline(always)]
    fn check<const L: u8, const N: usize>(&mut self, m: [&F; N], at: usize) {
        if any_above::<L, N>(m, self.best) {
            (self.best, self.from) = (hmax_of(m), self.start);
        }
        self.start = at;
    }
}

/// The maximum over the non-NaN values and the lowest column holding it
/// (column 0 for a row of -inf and NaN only): one pass for the value, then
/// a search for its first occurrence from the segment where the pass saw
/// the maximum first reached, cheaper than carrying each lane's column
/// through the whole row.
#[inline(always)]
fn scan_max<const L: u8, S: Src>(x: S) -> (f32, usize) {
    let (mx, from) = row_max::<L, S>(x);
    if mx == NEG_INF {
        return (mx, 0);
    }
    (mx, first_equal::<L, S>(x, from, x.len(), mx))
}

/// What is wrong with a row that did not normalise (NaN first, as SPEC
/// lists faults by the value that causes them).
#[cold]
fn classify_fault<S: Src>(x: S) -> RowFault {
    let n = x.len();
    if (0..n).any(|i| x.at(i).is_nan()) {
        RowFault::Nan
    } else if (0..n).any(|i| x.at(i) == f32::INFINITY) {
        RowFault::PosInf
    } else {
        RowFault::AllNegInf
    }
}

#[inline(always)]
fn scan_impl<const L: u8>(x: &[f32]) -> (f32, usize) {
    scan_max::<L, _>(row::F32Le(bytemuck::cast_slice(x)))
}

dispatched! {
    /// The maximum of a row (NaN ignored) and the lowest column holding it.
    pub fn scan_row / scan_row_at(x: &[f32]) -> (f32, usize) => scan_impl
}

/// Stores exp(x - m) into `e`, the sum of every NORM_BLOCK columns into
/// `blocks`, and returns (sum exp(x - m), sum (x - m) exp(x - m)).
/// Walks a row of `n` columns block by block (NORM_BLOCK columns each):
/// `|b, lo, hi| body` gives the f32 lane sums of block b (columns lo..hi),
/// which are kept and reduced GROUP blocks at a time, away from the
/// dependency chains that produced them, into `blocks[b]` (in f64); the
/// expression's value is their total. The summation order depends only on
/// `n`. A macro, not a function taking a closure: a closure is compiled
/// without the caller's target features, and where LLVM does not inline it
/// the vector intrinsics inside become calls (measured: 40 times slower).
macro_rules! for_blocks {
    ($L:ident, $n:expr, $blocks:expr, |$b:ident, $lo:ident, $hi:ident| $body:block) => {{
        const GROUP: usize = 16;
        let n: usize = $n;
        let nb = norm_blocks(n);
        let mut lanes = [[0f32; W]; GROUP];
        let mut total = 0f64;
        let mut bi = 0usize;
        while bi < nb {
            let g = GROUP.min(nb - bi);
            for (k, l) in lanes[..g].iter_mut().enumerate() {
                let $b = bi + k;
                let $lo = $b * NORM_BLOCK;
                let $hi = ($lo + NORM_BLOCK).min(n);
                *l = $body;
            }
            for (k, l) in lanes[..g].iter().enumerate() {
                let v = hsum_wide::<$L>(l);
                $blocks[bi + k] = v;
                total += v;
            }
            bi += g;
        }
        total
    }};
}

/// The normalising pass over columns lo..hi of one block: e = exp(x - m)
/// (stored where STORE), and the block's lane sums of e and of (x - m) e.
/// Where TV (and STORE), first adds |v - uz e| of the e the buffer held to
/// `tv` (see `TvFold`), chunk by chunk as `tv_pass` does.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn exp_block<const L: u8, const STORE: bool, const TV: bool, S: Src>(
    x: S,
    lo: usize,
    hi: usize,
    m: f32,
    e: &mut [f32],
    v: &[f32],
    uz: f32,
    tv: &mut F,
) -> (F, F) {
    // Both sums start afresh in every block, so consecutive blocks'
    // dependency chains overlap.
    let mut s = [0f32; W];
    let mut t = [0f32; W];
    let mut c = lo;
    while c + W <= hi {
        if TV {
            tv_step::<L>(tv, load(&v[c..c + W]), load(&e[c..c + W]), uz);
        }
        // SAFETY: c + 16 <= hi <= n.
        let r = exp_step::<L>(&unsafe { x.chunk::<L>(c) }, m, &mut s, &mut t);
        if STORE {
            e[c..c + W].copy_from_slice(&r);
        }
        c += W;
    }
    if c < hi {
        if TV {
            tv_step::<L>(tv, &padded(&v[c..hi], 0.0), &padded(&e[c..hi], 0.0), uz);
        }
        let r = exp_step::<L>(&x.padded(c, hi, NEG_INF), m, &mut s, &mut t);
        if STORE {
            e[c..hi].copy_from_slice(&r[..hi - c]);
        }
    }
    (s, t)
}

/// The normalising pass: e = exp(x - m) of every column (stored where
/// STORE), the block sums of e into `blocks`; returns (sum e, sum (x - m) e).
#[inline(always)]
fn exp_pass<const L: u8, const STORE: bool, S: Src>(
    x: S,
    m: f32,
    e: &mut [f32],
    blocks: &mut [f64],
    ahead: Ahead,
    v: &[f32],
    fold: &mut TvFold,
) -> (f64, f64) {
    let n = x.len();
    #[cfg(target_arch = "x86_64")]
    if L == 1 && avx2_loops() {
        // As in fused_loop: what is owed is summed on its own first.
        settle_alone::<L>(v, e, fold);
        // SAFETY: level 1 is only instantiated inside functions compiled
        // with AVX2 and FMA, called after run-time detection; the buffer
        // lengths were asserted by the caller.
        return unsafe { avx2::exp_pass::<STORE, S>(x, m, e, blocks, ahead) };
    }
    // t is summed in f32 lanes per block (NORM_BLOCK columns), then in f64.
    let nb = norm_blocks(n);
    let mut t_acc = [0f64; W];
    let mut tv_acc = [0f64; W];
    macro_rules! walk {
        ($tv:literal, $uz:expr) => {
            for_blocks!(L, n, blocks, |b, lo, hi| {
                ahead.block(b, nb);
                let mut tv = [0f32; W];
                let (s, t) = exp_block::<L, STORE, $tv, S>(x, lo, hi, m, e, v, $uz, &mut tv);
                widen_add::<L>(&mut t_acc, &t);
                if $tv {
                    widen_add::<L>(&mut tv_acc, &tv);
                }
                s
            })
        };
    }
    let s_tot = match fold.owed.take() {
        Some(o) if STORE => {
            assert!(
                o.n == n && v.len() >= n,
                "normalise: owed row of another length"
            );
            let s_tot = walk!(true, o.uz);
            fold.settled = Some(o.finish(hsum64(&tv_acc)));
            s_tot
        }
        o => {
            fold.owed = o;
            walk!(false, 0.0)
        }
    };
    (s_tot, hsum64(&t_acc))
}

/// What `fold` owes, summed on its own pass (v and e still those it was
/// owed on).
#[inline(always)]
fn settle_alone<const L: u8>(v: &[f32], e: &[f32], fold: &mut TvFold) {
    if let Some(o) = fold.owed.take() {
        fold.settled = Some(o.alone::<L>(v, e));
    }
}

#[inline(always)]
fn normalise_any<const L: u8, const STORE: bool, S: Src>(
    x: S,
    e: &mut [f32],
    blocks: &mut [f64],
    ahead: Ahead,
    v: &[f32],
    fold: &mut TvFold,
) -> Result<RowNorm, RowFault> {
    assert!(
        !STORE || e.len() >= x.len(),
        "normalise: exp buffer shorter than the row"
    );
    assert!(
        blocks.len() >= norm_blocks(x.len()),
        "normalise: block buffer too short"
    );
    let (max, argmax) = scan_max::<L, S>(x);
    if !max.is_finite() {
        // No exponential is written: e is still the one owed on.
        settle_alone::<L>(v, e, fold);
        return Err(classify_fault(x));
    }
    let (s, t) = exp_pass::<L, STORE, S>(x, max, e, blocks, ahead, v, fold);
    // A NaN logit went through exp into the sum (NaN lanes are kept), so
    // one test here replaces a test per column.
    if s.is_nan() {
        return Err(classify_fault(x));
    }
    let ln_s = s.ln();
    Ok(RowNorm {
        max,
        argmax: argmax as u32,
        lse: max as f64 + ln_s,
        sum: s,
        entropy: ln_s - t / s,
    })
}

#[inline(always)]
fn normalise_impl<const L: u8>(
    x: &[f32],
    e: &mut [f32],
    blocks: &mut [f64],
) -> Result<RowNorm, RowFault> {
    normalise_any::<L, true, _>(
        row::F32Le(bytemuck::cast_slice(x)),
        e,
        blocks,
        Ahead::NONE,
        &[],
        &mut TvFold::default(),
    )
}

#[inline(always)]
fn normalise_only_impl<const L: u8>(x: &[f32], blocks: &mut [f64]) -> Result<RowNorm, RowFault> {
    normalise_any::<L, false, _>(
        row::F32Le(bytemuck::cast_slice(x)),
        &mut [],
        blocks,
        Ahead::NONE,
        &[],
        &mut TvFold::default(),
    )
}

#[inline(always)]
fn normalise_row_impl<const L: u8>(
    x: Row,
    e: &mut [f32],
    blocks: &mut [f64],
    ahead: Ahead,
) -> Result<RowNorm, RowFault> {
    let fold = &mut TvFold::default();
    with_src!(x, s => normalise_any::<L, true, _>(s, e, blocks, ahead, &[], fold))
}

#[inline(always)]
fn normalise_settling_impl<const L: u8>(
    x: Row,
    e: &mut [f32],
    blocks: &mut [f64],
    ahead: Ahead,
    s: &PairScratch,
    fold: &mut TvFold,
) -> Result<RowNorm, RowFault> {
    let v = &s.v[..];
    with_src!(x, src => normalise_any::<L, true, _>(src, e, blocks, ahead, v, fold))
}

dispatched! {
    /// `normalise_store` of a row in its stored form, widened as it is
    /// read; `ahead` is pulled toward the cache meanwhile.
    pub fn normalise_row / normalise_row_at(x: Row, e: &mut [f32], blocks: &mut [f64], ahead: Ahead) -> Result<RowNorm, RowFault> => normalise_row_impl
}

dispatched! {
    /// `normalise_row` of the next reference row into the `e` a fused pass
    /// over `s` left a total variation owed on (`fold.owed`; see
    /// `TvFold`): the pass adds each chunk's |v - uz e| before it
    /// overwrites the chunk's e, and leaves the sum in `fold.settled`
    /// (summed on its own where the row fails first).
    pub fn normalise_settling / normalise_settling_at(x: Row, e: &mut [f32], blocks: &mut [f64], ahead: Ahead, s: &PairScratch, fold: &mut TvFold) -> Result<RowNorm, RowFault> => normalise_settling_impl
}

dispatched! {
    /// Log-softmax summary of one row. `e` receives exp(x - max) of every
    /// column (len >= x.len()), which `compare_stored` reuses; `blocks`
    /// receives the block sums of those values that the sampler walks
    /// (len >= ceil(len / NORM_BLOCK)).
    pub fn normalise_store / normalise_store_at(x: &[f32], e: &mut [f32], blocks: &mut [f64]) -> Result<RowNorm, RowFault> => normalise_impl
}

dispatched! {
    /// `normalise_store` without keeping the exponentials (the same
    /// results, to the bit).
    pub fn normalise / normalise_at(x: &[f32], blocks: &mut [f64]) -> Result<RowNorm, RowFault> => normalise_only_impl
}

/// Number of NORM_BLOCK blocks of a row of `cols` columns.
pub fn norm_blocks(cols: usize) -> usize {
    cols.div_ceil(NORM_BLOCK)
}

// ---------------------------------------------------------------------------
// The pair pass.

/// Taylor coefficients of g(d) / d^2 = (d + e^-d - 1) / d^2 = sum_k (-d)^k / (k + 2)!
/// to d^6, for `compare_stored`, which evaluates g(d) and g(-d) from one
/// set of even and odd parts. The next term is below 6e-8 relative at
/// |d| = 0.5.
const C: [f32; 7] = [
    1.0 / 2.0,
    -1.0 / 6.0,
    1.0 / 24.0,
    -1.0 / 120.0,
    1.0 / 720.0,
    -1.0 / 5040.0,
    1.0 / 40320.0,
];
/// Below this |d| the series to d^6 is used (`compare_stored`) and the fused
/// pass takes its shorter polynomial.
const SERIES_BELOW: f32 = 0.5;
/// Below this |d| the fused pass uses its longer polynomial.
const FUSED_SERIES_BELOW: f32 = 1.25;

// The fused pass's g(d) = d^2 P(d), with P interpolating g(d) / d^2 at
// Chebyshev nodes (near-minimax) instead of the Taylor polynomial `C`: one
// multiply-add fewer on |d| < 0.5 for the same accuracy, and the longer one
// covers |d| < 1.25 with two fewer than Taylor would need. Printed by
// scripts/fit_series.py; lowest degree first.
/// g(d) / d^2 on |d| <= 0.5, degree 5: largest relative error 5.9e-8 with
/// the coefficients rounded to f32.
const G_SHORT: [f32; 6] = [
    0.5,
    -0.16666667,
    0.041665792,
    -0.008333236,
    0.0013982186,
    -0.00019944874,
];
/// g(d) / d^2 on |d| <= 1.25, degree 7: largest relative error 5.3e-8 with
/// the coefficients rounded to f32.
const G_LONG: [f32; 8] = [
    0.5,
    -0.16666667,
    0.041666936,
    -0.008333358,
    0.0013880298,
    -0.00019833485,
    2.5676913e-05,
    -2.8351076e-06,
];

/// g(d) = d + e^-d - 1 for |d| < 1.25 where `LONG`, else for |d| < 0.5,
/// two multiply-adds fewer. Pairs of terms first (c0 + c1 d, ...), so the
/// dependency chain is three multiply-adds instead of five or seven (the
/// fused pass used to be bound by that chain: 8% faster per row on AVX-512
/// than Horner's scheme, within noise on AVX2). The short form then takes
/// the pairs by Horner's scheme in d^2, which has the same three steps as
/// Estrin's (powers d^2 and d^4) without forming d^4: one multiply fewer
/// (`compare_fused` 1.03x on AVX-512, fastest of ten alternating runs of
/// each build). The long form keeps d^4, which saves it a fourth step.
///
/// `j` is the lane (0..16) that `d` sits in: the coefficients are read from
/// one copy per lane (`G_SHORT_LANES`, `G_LONG_LANES`), so the vectorised
/// loop reads each as a whole vector, which LLVM keeps in a register
/// through the fused loop. Written as scalar constants, LLVM chose to
/// broadcast two of them from memory again in every 16-column step
/// (`vbroadcastss`), and the loop ran slower: `compare_fused_bf16` 1.038x
/// and 1.054x, `fused_row_bf16` 1.034x and 1.032x, `row_from_memory_ahead`
/// 1.020x and 1.032x with the lane copies on AVX-512 (fastest of 12 and 10
/// alternating runs of each build; whole runs 1.021x on two threads, 1.028x
/// with three candidates). The values, and so the bits, are the same.
#[inline(always)]
fn g_series<const L: u8, const LONG: bool>(d: f32, j: usize) -> f32 {
    let ma = mul_add::<L>;
    let d2 = d * d;
    let p = if LONG {
        let c = |k: usize| G_LONG_LANES[k][j];
        let d4 = d2 * d2;
        let lo = ma(d2, ma(c(3), d, c(2)), ma(c(1), d, c(0)));
        let hi = ma(d2, ma(c(7), d, c(6)), ma(c(5), d, c(4)));
        ma(d4, hi, lo)
    } else {
        let c = |k: usize| G_SHORT_LANES[k][j];
        let mid = ma(d2, ma(c(5), d, c(4)), ma(c(3), d, c(2)));
        ma(d2, mid, ma(c(1), d, c(0)))
    };
    d2 * p
}

/// One copy of each coefficient per lane (see `g_series`).
static G_SHORT_LANES: [F; 6] = per_lane(G_SHORT);
static G_LONG_LANES: [F; 8] = per_lane(G_LONG);

const fn per_lane<const N: usize>(c: [f32; N]) -> [F; N] {
    let mut out = [[0f32; W]; N];
    let mut k = 0;
    while k < N {
        out[k] = [c[k]; W];
        k += 1;
    }
    out
}

struct PairConsts {
    /// 1 / sum of the reference's exp(x - max), so p = e_ref * inv_r.
    inv_r: f32,
    inv_c: f32,
    /// lse_c - lse_r, so d = (x - y) + cst.
    cst: f32,
    /// Offsets subtracted from each row before differencing (0 or the row max).
    sx: f32,
    sy: f32,
}

/// Adds 16 columns' contributions to KL(p||q), KL(q||p) and |p - q|.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn pair_step<const L: u8>(
    x: &F,
    y: &F,
    er: &F,
    ec: &F,
    k: &PairConsts,
    f: &mut F,
    b: &mut F,
    t: &mut F,
    m: &mut F,
    sg: &mut F,
) {
    let ma = mul_add::<L>;
    let mut d = [0f32; W];
    for j in 0..W {
        d[j] = ((x[j] - k.sx) - (y[j] - k.sy)) + k.cst;
    }
    if all_abs_below::<L>(&d, SERIES_BELOW) {
        // Every column of the chunk in the series range, the common case for
        // a compressed model. Both logits are finite here; a probability
        // that underflowed to 0 leaves out a term below 1e-38.
        for j in 0..W {
            let p = er[j] * k.inv_r;
            let q = ec[j] * k.inv_c;
            let d2 = d[j] * d[j];
            let ev = ma(d2, ma(d2, ma(d2, C[6], C[4]), C[2]), C[0]);
            let od = d[j] * ma(d2, ma(d2, C[5], C[3]), C[1]);
            let gd = d2 * (ev + od);
            f[j] = ma(p, gd, f[j]);
            b[j] = ma(q * d2, ev - od, b[j]);
            // |p - q| = p |e^-d - 1| = p |g(d) - d|, without subtracting two
            // separately rounded probabilities.
            let em1 = gd - d[j];
            t[j] = ma(p, em1.abs(), t[j]);
            // For the normaliser correction (see compare_impl).
            m[j] = ma(p, em1, m[j]);
            sg[j] = ma(
                q,
                if d[j] > 0.0 {
                    1.0
                } else if d[j] < 0.0 {
                    -1.0
                } else {
                    0.0
                },
                sg[j],
            );
        }
        return;
    }
    for j in 0..W {
        let p = er[j] * k.inv_r;
        let q = ec[j] * k.inv_c;
        let d = d[j];
        let d2 = d * d;
        // g(d)/d^2 and g(-d)/d^2 from the even and odd parts of one series.
        let ev = ma(d2, ma(d2, ma(d2, C[6], C[4]), C[2]), C[0]);
        let od = d * ma(d2, ma(d2, C[5], C[3]), C[1]);
        let pq = p - q;
        let small = d.abs() < SERIES_BELOW;
        let gd = d2 * (ev + od);
        // Direct forms: p d + (q - p) and (p - q) - q d.
        let fwd = if small { p * gd } else { ma(p, d, -pq) };
        let rev = if small {
            (q * d2) * (ev - od)
        } else {
            ma(-q, d, pq)
        };
        // Close columns: |p - q| = p |g(d) - d| (see the series-only path).
        let tv = if small { p * (gd - d).abs() } else { pq.abs() };
        // Where one side has no mass the sum picks up the other side's mass
        // (SPEC: "+ candidate mass where p is zero"); both zero gives 0.
        let fwd = if p == 0.0 { q } else { fwd };
        let rev = if q == 0.0 { p } else { rev };
        let tv = if p == 0.0 || q == 0.0 { pq.abs() } else { tv };
        // p (e^-d - 1), whose sum is 0 when d carries the exact normaliser difference.
        let em = if small && p != 0.0 && q != 0.0 {
            p * (gd - d)
        } else {
            -pq
        };
        let sd = if d > 0.0 {
            1.0
        } else if d < 0.0 {
            -1.0
        } else {
            0.0
        };
        let sq = if q == 0.0 { 0.0 } else { q * sd };
        f[j] += fwd;
        b[j] += rev;
        t[j] += tv;
        m[j] += em;
        sg[j] += sq;
    }
}

#[inline(always)]
fn compare_impl<const L: u8>(
    x: &[f32],
    y: &[f32],
    er: &[f32],
    ec: &[f32],
    r: &RowNorm,
    c: &RowNorm,
) -> PairMetrics {
    let n = x.len();
    assert!(
        y.len() == n && er.len() >= n && ec.len() >= n,
        "compare: row lengths differ"
    );
    // d = (x - lse_r) - (y - lse_c) = (x - y) + (lse_c - lse_r); the constant in f64.
    // Its rounding is a uniform shift of d, to which the sum is insensitive to first order.
    // When both rows sit at about the same level, x - y is exact for close
    // logits and d = (x - y) + (lse_c - lse_r). When their levels differ (a
    // raw dump against a centered one, or logits offset by 1e7), x - y would
    // round away the difference between the models; then each row is first
    // taken relative to its own maximum, which is exact for every column that
    // carries mass, and the constant becomes the difference of log sums.
    let (sx, sy, cst) = if (r.max - c.max).abs() <= 1.0 {
        (0.0, 0.0, (c.lse - r.lse) as f32)
    } else {
        (
            r.max,
            c.max,
            ((c.lse - c.max as f64) - (r.lse - r.max as f64)) as f32,
        )
    };
    let k = PairConsts {
        inv_r: (1.0 / r.sum) as f32,
        inv_c: (1.0 / c.sum) as f32,
        cst,
        sx,
        sy,
    };
    let mut acc = [[0f64; W]; 5];
    let blocks = x
        .chunks(PAIR_BLOCK)
        .zip(y.chunks(PAIR_BLOCK))
        .zip(er[..n].chunks(PAIR_BLOCK))
        .zip(ec[..n].chunks(PAIR_BLOCK));
    for (((bx, by), br), bc) in blocks {
        let (mut f, mut b, mut t, mut m, mut sg) =
            ([0f32; W], [0f32; W], [0f32; W], [0f32; W], [0f32; W]);
        let (cx, cy, cr, cc) = (
            bx.chunks_exact(W),
            by.chunks_exact(W),
            br.chunks_exact(W),
            bc.chunks_exact(W),
        );
        let (tx, ty, tr, tc) = (
            cx.remainder(),
            cy.remainder(),
            cr.remainder(),
            cc.remainder(),
        );
        for (((vx, vy), vr), vc) in cx.zip(cy).zip(cr).zip(cc) {
            pair_step::<L>(
                load(vx),
                load(vy),
                load(vr),
                load(vc),
                &k,
                &mut f,
                &mut b,
                &mut t,
                &mut m,
                &mut sg,
            );
        }
        if !tx.is_empty() {
            // Padding columns have no mass on either side and add exactly 0.
            let (px, py) = (padded(tx, NEG_INF), padded(ty, NEG_INF));
            let (pr, pc) = (padded(tr, 0.0), padded(tc, 0.0));
            pair_step::<L>(
                &px, &py, &pr, &pc, &k, &mut f, &mut b, &mut t, &mut m, &mut sg,
            );
        }
        widen_add::<L>(&mut acc[0], &f);
        widen_add::<L>(&mut acc[1], &b);
        widen_add::<L>(&mut acc[2], &t);
        widen_add::<L>(&mut acc[3], &m);
        widen_add::<L>(&mut acc[4], &sg);
    }
    // The f32 exponentials make lse_c - lse_r uncertain by ~1e-7, a uniform
    // shift D of every d. KL does not feel it to first order, but total
    // variation does (d/dD of sum p|e^-d - 1| = sum q sign(d)), and for close
    // rows 1e-7 is a visible part of it. The exact shift follows from
    // sum p e^-(d + D) = sum q = 1: D = log(1 + M) with M = sum p (e^-d - 1),
    // a sum of small terms that the pass accumulates anyway.
    let shift = hsum64(&acc[3]).ln_1p();
    let kl = hsum64(&acc[0]) - shift * hsum64(&acc[3]);
    let tv = 0.5 * (hsum64(&acc[2]) + shift * hsum64(&acc[4]));
    PairMetrics {
        kl: kl.max(0.0),
        kl_reverse: hsum64(&acc[1]),
        tv: tv.clamp(0.0, 1.0),
    }
}

dispatched! {
    /// KL both ways and total variation between two rows normalised by
    /// `normalise_store`, from the logits and the stored exponentials.
    pub fn compare_stored / compare_stored_at(x: &[f32], y: &[f32], er: &[f32], ec: &[f32], r: &RowNorm, c: &RowNorm) -> PairMetrics => compare_impl
}

// ---------------------------------------------------------------------------
// The fused pair pass: the candidate normalised inside the comparison.
//
// `normalise_store` + `compare_stored` cost the candidate a pass of its own
// (a max scan and an exp per column) before the pair pass. The fused pass
// needs neither. It takes the candidate relative to its value at the
// reference's top column a (the anchor y_a) and the reference relative to
// its maximum x_a, and works with d = (x - x_a) - (y - y_a), the log ratio
// up to one unknown constant: with e = exp(x - x_a) (stored by the reference
// pass), S = sum e, w = exp(y - y_a) = e exp(-d) and Z = sum w,
//
//   p = e / S,  q = w / Z,  log p - log q = d + log(Z / S).
//
// For close rows (every |d| < 1 in a chunk of 16) w - e = e (e^-d - 1)
// comes from the same series as g(d) = d + e^-d - 1, so the candidate costs
// no exp at all. With u = (sum e g(d) - sum e d) / S = Z / S - 1 (summed
// from the series, not by differencing two rounded sums):
//
//   KL(p||q) = sum p d + log(1 + u) = sum p g(d) + (log1p(u) - u),
//
// a non-negative sum plus a second-order term, so rows at 1e-7 nats keep
// their precision. KL(q||p) follows from sum (p - q) log(p/q) =
// KL(p||q) + KL(q||p), whose left side is (u_z sum e d - sum v d) / Z with
// v = w - e and u_z = sum v / S. Total variation needs the constant inside
// the absolute value: |p - q| = |v - u_z e| / Z, summed by a short second
// pass over v (kept by the first) and e. The candidate's log-sum-exp,
// entropy, maximum and block sums for the sampler come out of the same
// sums. Rows this form cannot hold (a non-finite sum, the candidate's
// maximum more than 80 above its anchor, where exp(y - y_a) would overflow)
// give None, and the caller takes the two-pass route.

/// Result of the fused pass.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fused {
    pub m: PairMetrics,
    /// The candidate's log-softmax summary, as `normalise` gives it (to rounding).
    pub c: RowNorm,
    /// The candidate's value at the reference's top column: the block sums
    /// the pass wrote are sums of exp(y - anchor).
    pub anchor: f32,
    /// Where the pass was allowed to (`TvFold::defer`), it left its total
    /// variation to be summed later over the v it wrote (`m.tv` is then
    /// NaN): by the next fused pass over the same buffer, or by
    /// `PairScratch::settle`.
    pub owed: Option<TvOwed>,
}

/// A total variation a fused pass left owed: sum |v - uz e| / 2Z over the
/// v the pass wrote and the reference's e.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TvOwed {
    uz: f32,
    z: f64,
    /// The row's length.
    n: usize,
}

impl TvOwed {
    /// The total variation from the sum of |v - uz e|.
    fn finish(self, sum: f64) -> f64 {
        (0.5 * sum / self.z).clamp(0.0, 1.0)
    }

    /// The total variation summed by its own pass over `v` and `e`.
    #[inline(always)]
    fn alone<const L: u8>(self, v: &[f32], e: &[f32]) -> f64 {
        self.finish(tv_pass::<L>(&v[..self.n], &e[..self.n], self.uz))
    }
}

/// Total variation handed from one fused pass to the next. The second
/// pass over v and e that total variation needs (see the section comment)
/// reads back 1 MiB per 128k row on its own; the next candidate's fused
/// pass over the same reference row reads e anyway and overwrites v, so it
/// adds |v - uz e| of each chunk before it writes the chunk's new v, in the
/// order the pass on its own takes, so to the same bits.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct TvFold {
    /// In: the pass may leave its own total variation owed (`Fused::owed`).
    pub defer: bool,
    /// In: what the previous pass over this v buffer left owed. Taken (set
    /// to None) once summed.
    pub owed: Option<TvOwed>,
    /// Out: that total variation, summed.
    pub settled: Option<f64>,
}

struct FusedConsts {
    /// d = ((x - sx) - (y - sy)) - kc.
    sx: f32,
    sy: f32,
    kc: f32,
    /// The candidate's anchor Q: w = exp(y - Q) = e exp(-d).
    ya: f32,
}

/// The typical (x - sx) - (y - sy) of a row pair: the mean over up to 256
/// evenly spaced columns where both are finite, or `fallback`. Taking d
/// relative to it centres the differences of the whole row, so a candidate
/// whose value at the reference's top column happens to be off by its noise
/// does not push every column of the row off the series route.
#[inline(always)]
fn centre<SX: Src, SY: Src>(x: SX, y: SY, sx: f32, sy: f32, fallback: f32) -> f32 {
    const SAMPLE: usize = 256;
    let n = x.len();
    let step = (n / SAMPLE).max(1);
    let (mut sum, mut count) = (0f64, 0usize);
    for i in (0..n).step_by(step) {
        let d = (x.at(i) - sx) - (y.at(i) - sy);
        if d.is_finite() {
            sum += d as f64;
            count += 1;
        }
    }
    if count == 0 {
        fallback
    } else {
        (sum / count as f64) as f32
    }
}

/// f32 partial sums of one chunk run: e g(d) (with the candidate's mass
/// where e = 0), v d, v (x - sx), and the lane maxima of y.
struct FusedLanes {
    g: F,
    j: F,
    t: F,
    my: F,
    /// Set once a chunk of the row needed the longer series: from then on
    /// every close chunk takes it, so the route stays predictable on rows
    /// where the two mix (a coarse candidate) instead of mispredicting.
    long: bool,
    /// Where the lane maxima of y last rose, checked at each carry.
    rise: Rise,
}

impl FusedLanes {
    fn new() -> FusedLanes {
        FusedLanes {
            g: [0f32; W],
            j: [0f32; W],
            t: [0f32; W],
            my: [NEG_INF; W],
            long: false,
            rise: Rise::NEW,
        }
    }

    /// Adds the f32 sums of e g(d), v d and v (x - sx) into their f64
    /// lanes and starts them afresh; `at`: the column the pass has reached.
    #[inline(always)]
    fn carry<const L: u8>(&mut self, acc: &mut [[f64; W]; 3], at: usize) {
        for (q, l) in [&mut self.g, &mut self.j, &mut self.t]
            .into_iter()
            .enumerate()
        {
            widen_add::<L>(&mut acc[q], l);
            *l = [0f32; W];
        }
        self.rise.check::<L, 1>([&self.my], at);
    }
}

/// v = w - e = e (g(d) - d) of a column on the series route, as
/// e g(d) - e d: e d is formed beside the series, so v waits for one
/// multiply-add after g instead of two steps.
#[inline(always)]
fn close_v<const L: u8>(e: f32, gd: f32, d: f32) -> f32 {
    mul_add::<L>(e, gd, -(e * d))
}

/// The series route of `fused_step` for 16 close columns (see there).
#[inline(always)]
fn fused_close<const L: u8, const LONG: bool>(
    d: &F,
    xs: &F,
    y: &F,
    er: &F,
    s: &mut FusedLanes,
    vb: &mut F,
) -> F {
    let ma = mul_add::<L>;
    let mut out = [0f32; W];
    for j in 0..W {
        let e = er[j];
        let gd = g_series::<L, LONG>(d[j], j);
        let v = close_v::<L>(e, gd, d[j]);
        s.g[j] = ma(e, gd, s.g[j]);
        s.j[j] = ma(v, d[j], s.j[j]);
        s.t[j] = ma(v, xs[j], s.t[j]);
        vb[j] += v;
        s.my[j] = if y[j] > s.my[j] { y[j] } else { s.my[j] };
        out[j] = v;
    }
    out
}

/// Adds 16 columns to the fused sums; returns v = w - e of each column.
#[inline(always)]
fn fused_step<const L: u8, const OFF: bool>(
    x: &F,
    y: &F,
    er: &F,
    k: &FusedConsts,
    s: &mut FusedLanes,
    vb: &mut F,
) -> F {
    let ma = mul_add::<L>;
    let mut d = [0f32; W];
    let mut xs = [0f32; W];
    // OFF: each row first taken relative to its own top value (sx = x_a,
    // sy = y_a); else sx = sy = 0 and the second form gives the same bits
    // with two subtractions fewer. (The sum of v x then carries the
    // logits' level, |x_a| up to 64, into the candidate's entropy, an error
    // that grows with |x_a| TV: within 2e-5 |x_a| TV nats in the randomized
    // test. Taking x - x_a here instead measured 6% slower on the fused
    // pass; see DEVELOPERS.md, Numerics.)
    for j in 0..W {
        if OFF {
            xs[j] = x[j] - k.sx;
            d[j] = (xs[j] - (y[j] - k.sy)) - k.kc;
        } else {
            xs[j] = x[j];
            d[j] = (x[j] - y[j]) - k.kc;
        }
    }
    // The common case: every column of the chunk close (both logits finite).
    // sum e d is not kept: it is sum e g(d) - sum v, column by column.
    let mut d2 = [0f32; W];
    for j in 0..W {
        d2[j] = d[j] * d[j];
    }
    if !s.long && all_below::<L>(&d2, SERIES_BELOW * SERIES_BELOW) {
        return fused_close::<L, false>(&d, &xs, y, er, s, vb);
    }
    if all_below::<L>(&d2, FUSED_SERIES_BELOW * FUSED_SERIES_BELOW) {
        s.long = true;
        return fused_close::<L, true>(&d, &xs, y, er, s, vb);
    }
    let mut out = [0f32; W];
    for j in 0..W {
        let e = er[j];
        let dj = d[j];
        let w = exp::exp_clamped::<L>(y[j] - k.ya);
        let small = dj.abs() < FUSED_SERIES_BELOW;
        let gd = g_series::<L, true>(dj, j);
        let pos = e > 0.0;
        // e g(d) in the direct form e d + w - e away from 0; where the
        // reference has no mass the candidate's mass w (the sum's R term).
        let g = if pos {
            if small {
                e * gd
            } else {
                ma(e, dj, w - e)
            }
        } else {
            w
        };
        let v = if pos && small {
            close_v::<L>(e, gd, dj)
        } else {
            w - e
        };
        // Columns where neither side has mass add nothing (their d may be NaN).
        let jt = if v == 0.0 { 0.0 } else { v * dj };
        let tt = if v == 0.0 { 0.0 } else { v * xs[j] };
        s.g[j] += g;
        s.j[j] += jt;
        s.t[j] += tt;
        vb[j] += v;
        s.my[j] = if y[j] > s.my[j] { y[j] } else { s.my[j] };
        out[j] = v;
    }
    out
}

/// Columns c .. c + 16 of two stored rows and of an f32 buffer beside them.
///
/// # Safety
/// c + 16 is at most the length of all three.
#[inline(always)]
unsafe fn chunks3<const L: u8, SX: Src, SY: Src>(x: SX, y: SY, e: &[f32], c: usize) -> (F, F, F) {
    // SAFETY: as the caller promises.
    unsafe {
        (
            x.chunk::<L>(c),
            y.chunk::<L>(c),
            std::ptr::read_unaligned(e.as_ptr().add(c) as *const F),
        )
    }
}

/// The fused pass over columns lo..hi of one block: adds them to `s`,
/// writes v into `vbuf`, and returns the block's lane sums of v. Where TV,
/// first adds |v - uz e| of the v the buffer held to `tv` (see `TvFold`),
/// chunk by chunk as `tv_pass` does.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn fused_block<const L: u8, const OFF: bool, const TV: bool, SX: Src, SY: Src>(
    x: SX,
    y: SY,
    er: &[f32],
    k: &FusedConsts,
    s: &mut FusedLanes,
    vbuf: &mut [f32],
    lo: usize,
    hi: usize,
    uz: f32,
    tv: &mut F,
) -> F {
    let mut vb = [0f32; W];
    let mut c = lo;
    while c + W <= hi {
        // SAFETY: c + 16 <= hi <= n, and every buffer holds n columns
        // (asserted by the caller).
        let (xc, yc, ec) = unsafe { chunks3::<L, SX, SY>(x, y, er, c) };
        let vp = vbuf.as_mut_ptr().wrapping_add(c) as *mut F;
        if TV {
            // SAFETY: as above.
            tv_step::<L>(tv, &unsafe { std::ptr::read_unaligned(vp) }, &ec, uz);
        }
        let v = fused_step::<L, OFF>(&xc, &yc, &ec, k, s, &mut vb);
        // SAFETY: as above, for the 16 columns written.
        unsafe { std::ptr::write_unaligned(vp, v) };
        c += W;
    }
    if c < hi {
        let ep = padded(&er[c..hi], 0.0);
        if TV {
            tv_step::<L>(tv, &padded(&vbuf[c..hi], 0.0), &ep, uz);
        }
        // Padding columns have no mass on either side and add exactly 0.
        let v = fused_step::<L, OFF>(
            &x.padded(c, hi, NEG_INF),
            &y.padded(c, hi, NEG_INF),
            &ep,
            k,
            s,
            &mut vb,
        );
        vbuf[c..hi].copy_from_slice(&v[..hi - c]);
    }
    vb
}

/// Blocks (of NORM_BLOCK columns) after which the fused pass carries its
/// f32 lane sums into f64: twice PAIR_BLOCK, 512 columns, 32 terms per lane.
/// A carry converts and adds three sums whose f64 lanes LLVM keeps on the
/// stack (the loop's constants hold the registers); every 256 columns that
/// cost about 5% of the pass (`compare_fused` 1.06x at 512 on AVX-512,
/// 1.025x on AVX2, fastest of 12 and 8 alternating runs). A recursive f32
/// sum of 32 terms is within 31 x 2^-24 (1.8e-6) of the sum of their
/// magnitudes (the recursive-summation bound, common practice; as in
/// Higham's "Accuracy and Stability of Numerical Algorithms", ch. 4, cited
/// from memory), against 0.9e-6 at 256: far inside the kernel
/// tests' bounds, which pass unchanged, as do a million randomized pairs.
const FUSED_CARRY: usize = 2 * PAIR_BLOCK / NORM_BLOCK;

/// The fused pass's loop over the row: the f64 sums of e g(d), v d and
/// v (x - sx), the sum of v (its block sums into `bw`), the lane maxima of
/// y, and the column where the search for y's first maximum may start.
/// Where `fold` holds a total variation owed over the v in `vbuf`, it is
/// summed first (into `fold.settled`).
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn fused_loop<const L: u8, const OFF: bool, SX: Src, SY: Src>(
    x: SX,
    y: SY,
    er: &[f32],
    k: &FusedConsts,
    vbuf: &mut [f32],
    bw: &mut [f64],
    ahead: Ahead,
    fold: &mut TvFold,
) -> ([[f64; W]; 3], f64, F, usize) {
    let n = x.len();
    let nb = norm_blocks(n);
    assert!(
        y.len() == n && er.len() >= n && vbuf.len() >= n && bw.len() >= nb,
        "compare_fused: row or buffer lengths differ"
    );
    let mut s = FusedLanes::new();
    let mut acc = [[0f64; W]; 3];
    #[cfg(target_arch = "x86_64")]
    if L == 1 && avx2_loops() {
        // The AVX2 loop has no registers to spare: what is owed is summed
        // on its own first.
        settle_alone::<L>(vbuf, er, fold);
        // SAFETY: level 1 is only instantiated inside functions compiled
        // with AVX2 and FMA, called after run-time detection; the buffer
        // lengths are asserted above.
        let vtot = unsafe {
            avx2::fused_loop::<OFF, SX, SY>(x, y, er, k, &mut s, &mut acc, vbuf, bw, ahead)
        };
        return (acc, vtot, s.my, s.rise.from);
    }
    let mut tacc = [0f64; W];
    macro_rules! walk {
        ($tv:literal, $uz:expr) => {
            for_blocks!(L, n, bw, |b, lo, hi| {
                ahead.block(b, nb);
                let mut t = [0f32; W];
                let vb = fused_block::<L, OFF, $tv, SX, SY>(
                    x, y, er, k, &mut s, vbuf, lo, hi, $uz, &mut t,
                );
                if $tv {
                    widen_add::<L>(&mut tacc, &t);
                }
                if b % FUSED_CARRY == FUSED_CARRY - 1 {
                    s.carry::<L>(&mut acc, hi);
                }
                vb
            })
        };
    }
    let vtot = match fold.owed.take() {
        Some(o) => {
            debug_assert_eq!(o.n, n);
            let vtot = walk!(true, o.uz);
            fold.settled = Some(o.finish(hsum64(&tacc)));
            vtot
        }
        None => walk!(false, 0.0),
    };
    s.carry::<L>(&mut acc, n);
    (acc, vtot, s.my, s.rise.from)
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn fused_src<const L: u8, SX: Src, SY: Src>(
    x: SX,
    y: SY,
    er: &[f32],
    br: &[f64],
    r: &RowNorm,
    vbuf: &mut [f32],
    bw: &mut [f64],
    ahead: Ahead,
    fold: &mut TvFold,
) -> Option<Fused> {
    let n = x.len();
    let nb = norm_blocks(n);
    assert!(
        y.len() == n && er.len() >= n && vbuf.len() >= n && bw.len() >= nb && br.len() >= nb,
        "compare_fused: row or buffer lengths differ"
    );
    if n == 0 {
        return None;
    }
    let xa = r.max;
    let ya = y.at(r.argmax as usize);
    if !ya.is_finite() {
        return None;
    }
    // As in compare_stored: x - y is exact for close logits, so when both
    // rows sit at about the same (moderate) level d is formed from it; else
    // each row is first taken relative to its own anchor, exact for every
    // column that carries mass.
    let kraw = xa - ya;
    let off = !(kraw.abs() <= 1.0 && xa.abs() <= 64.0);
    let (sx, sy) = if off { (xa, ya) } else { (0.0, 0.0) };
    let mut kc = centre(x, y, sx, sy, kraw - (sx - sy));
    let mut second = false;
    // The centre of a first pass that was only off centre, not lossy.
    let mut kept: Option<f32> = None;
    loop {
        let got =
            fused_pass::<L, SX, SY>(x, y, er, br, r, vbuf, bw, sx, sy, kc, off, ya, ahead, fold)?;
        // The sums are exact relative to their own size, and the result is a
        // difference of two of them when the reference's mass sits at a d of
        // its own (the row's centre is not the p-weighted one): with u = Z/S - 1,
        // KL = sum p g(d) - (u^2/2 - ...), TV = sum |v - u e| / 2Z. Where that
        // costs more than two digits, the pass is repeated once with d centred
        // on its p-weighted mean, which makes u second order. That test
        // needs Z itself, S + sum v, to be good: where the candidate's mass
        // at this centre is far below the reference's (Z < S/4, e.g. a
        // reference with all its mass on one column where the candidate has
        // little), sum v is nearly -S and Z is what is left of a
        // cancellation (found by fuzzing: a TV of 1.13, a KL 8% off). Such a
        // pass counts as lossy too.
        //
        // The candidate's entropy, which none of those tests watches, is a
        // difference of sums of the size of S divided by Z, and loses digits
        // where the centre is far from the p-weighted one (found by a
        // randomized search: a peaked candidate's entropy 4e-4 off,
        // relative, with p-weighted mean d of 1.3 and u = -0.71, where KL
        // and TV passed). So a first pass with |u| > 0.5 whose p-weighted
        // mean d is beyond 0.5 is repeated once on that centre too. (Not
        // every such pass: where the noise alone makes u large, the mean d
        // is near 0 and a second pass would change nothing; where the
        // reference's mass is split between columns of very different d, its
        // mean d is no better a centre and the second pass is lossy: then
        // the first pass, which was not, is run again for its answer, found
        // by `fused_pass_gives_identical_bits_at_every_level`.)
        let (f, u, mean_p) = got;
        let m = &f.m;
        // An owed total variation passed its test (see fused_pass).
        let lossy = 0.5 * u * u > 100.0 * m.kl.min(m.kl_reverse)
            || (f.owed.is_none() && u.abs() > 100.0 * m.tv)
            || u < -0.75;
        let off_centre = !second && u.abs() > 0.5 && mean_p.abs() > 0.5;
        if !lossy && !off_centre {
            return Some(f);
        }
        if second {
            // Still lossy on the new centre: the first pass's answer where
            // it was only off centre (v and the block sums are its own
            // again), else the two-pass route.
            let k0 = kept?;
            return fused_pass::<L, SX, SY>(
                x, y, er, br, r, vbuf, bw, sx, sy, k0, off, ya, ahead, fold,
            )
            .map(|g| g.0);
        }
        // Far from the centre (|u| > 1, the candidate's mass mostly where the
        // reference has little) the sums have lost the digits the new centre
        // would come from: the two-pass route answers instead.
        if u.abs() > 1.0 || !mean_p.is_finite() {
            return if lossy { None } else { Some(f) };
        }
        if !lossy {
            kept = Some(kc);
        }
        kc += mean_p as f32;
        second = true;
    }
}

/// One fused pass with the given centre; also returns u = Z/S - 1 and the
/// p-weighted mean of d.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn fused_pass<const L: u8, SX: Src, SY: Src>(
    x: SX,
    y: SY,
    er: &[f32],
    br: &[f64],
    r: &RowNorm,
    vbuf: &mut [f32],
    bw: &mut [f64],
    sx: f32,
    sy: f32,
    kc: f32,
    off: bool,
    ya: f32,
    ahead: Ahead,
    fold: &mut TvFold,
) -> Option<(Fused, f64, f64)> {
    let n = x.len();
    let nb = norm_blocks(n);
    let xa = r.max;
    // d = (x - x_a) - (y - Q) with the anchor Q = y_a - kc (offsets) or
    // x_a - kc: what exp(y - Q) is relative to. `a` is exact (sx is 0 or
    // x_a); Q = a - kc is rounded to f32, and kc is then taken as a - Q,
    // exact where |a| >= |kc| (Fast2Sum, common practice), so that the d of
    // the series route and the y - Q of the direct route describe the same
    // w. With the unrounded kc the two disagreed by up to half an ulp of the
    // logits' level (4e-6 at 65, 8e-6 at 140): found by a randomized
    // search, a KL 3.5e-4 low and a peaked candidate's entropy 1.3% off.
    let a = sy + (xa - sx);
    let q = a - kc;
    if !q.is_finite() {
        return None;
    }
    let kc = a - q;
    let k = FusedConsts { sx, sy, kc, ya: q };
    let (acc, vtot, my, from) = if off {
        fused_loop::<L, true, SX, SY>(x, y, er, &k, vbuf, bw, ahead, fold)
    } else {
        fused_loop::<L, false, SX, SY>(x, y, er, &k, vbuf, bw, ahead, fold)
    };
    let (gs, js, ts) = (hsum64(&acc[0]), hsum64(&acc[1]), hsum64(&acc[2]));
    // sum e d, from sum e g(d) - sum v (see fused_step).
    let as_ = gs - vtot;
    let max_c = hmax(&my);
    let sum_r = r.sum;
    let z = sum_r + vtot;
    let sane = gs.is_finite()
        && as_.is_finite()
        && js.is_finite()
        && ts.is_finite()
        && vtot.is_finite()
        && z > 0.0
        && max_c - q <= 80.0;
    if !sane {
        return None;
    }
    let u = (gs - as_) / sum_r;
    if u <= -1.0 {
        return None;
    }
    let kl = gs / sum_r + (u.ln_1p() - u);
    let uz = vtot / sum_r;
    let kl_reverse = (uz * as_ - js) / z - kl;
    let owed = TvOwed {
        uz: uz as f32,
        z,
        n,
    };
    // The caller tests the total variation for lost digits (|uz| > 100
    // TV; see fused_src). A pass may leave it owed only where that test
    // is sure to pass without it: |uz| within 99 times a lower bound (1%
    // below the test's factor, so that the bound's own rounding, in f64
    // with uz unrounded, cannot decide a row the test would not).
    let defer = fold.defer && uz.abs() <= 99.0 * tv_lower_bound(&vbuf[..n], er, bw, br, r, uz, z);
    let (tv, owed) = if defer {
        (f64::NAN, Some(owed))
    } else {
        (owed.alone::<L>(vbuf, er), None)
    };
    for (b, &r) in bw[..nb].iter_mut().zip(br) {
        *b = (*b + r).max(0.0);
    }
    // The candidate's summary. Its entropy: log Z - sum w (y - Q) / Z, where
    // sum w (y - Q) = sum (e + v)(x - x_a) - sum w d, from the sums above and
    // the reference's own sum e (x - x_a) = S (log S - H_r).
    let ln_z = z.ln();
    let t_r = sum_r * (sum_r.ln() - r.entropy);
    let hw = t_r + (ts - (xa - k.sx) as f64 * vtot) - as_ - js;
    let argmax = if max_c > ya {
        // The pass found the maximum: only its first column is missing.
        first_equal::<L, SY>(y, from, n, max_c)
    } else {
        // y_a is the maximum; the top column is the first that holds it.
        first_equal::<L, SY>(y, from, r.argmax as usize, ya)
    };
    let c = RowNorm {
        max: max_c,
        argmax: argmax as u32,
        lse: q as f64 + ln_z,
        sum: z * (q as f64 - max_c as f64).exp(),
        entropy: ln_z - hw / z,
    };
    let f = Fused {
        m: PairMetrics {
            kl: kl.max(0.0),
            kl_reverse: kl_reverse.max(0.0),
            tv,
        },
        c,
        anchor: q,
        owed,
    };
    Some((f, uz, as_ / sum_r))
}

/// A lower bound of the total variation sum |v - uz e| / 2Z from what a
/// fused pass already has: the same sum over a partition of the columns
/// (the triangle inequality, common practice), here the blocks (`bw`: the
/// block sums of v, `br`: of e), with the reference's top column, where a
/// peaked row's difference sits, split from its block. A partition's sum
/// over v - uz e is 0, so a row of one block without that column gives 0.
fn tv_lower_bound(
    v: &[f32],
    er: &[f32],
    bw: &[f64],
    br: &[f64],
    r: &RowNorm,
    uz: f64,
    z: f64,
) -> f64 {
    let a = r.argmax as usize;
    let ba = a / NORM_BLOCK;
    let mut t = 0f64;
    for (b, (&vb, &eb)) in bw.iter().zip(br).enumerate().take(norm_blocks(v.len())) {
        if b == ba {
            let (va, ea) = (v[a] as f64, er[a] as f64);
            t += (va - uz * ea).abs() + ((vb - va) - uz * (eb - ea)).abs();
        } else {
            t += (vb - uz * eb).abs();
        }
    }
    0.5 * t / z
}

/// The first column in `from..upto` holding `v`, the row's maximum (no
/// column before `from` holds it), or `upto`.
/// Whole chunks are tested 64 columns at a time, then 16 (nothing exceeds
/// `v`, so "not below v" means equal): one branch per 64 columns instead
/// of four (the kernel benchmark's `scan_row` 1.07x, `normalise_store`
/// 1.05x, side by side).
#[inline(always)]
fn first_equal<const L: u8, S: Src>(y: S, from: usize, upto: usize, v: f32) -> usize {
    let below = v.next_down();
    let mut i = from;
    while i + 4 * W <= upto {
        // SAFETY (both loops): every chunk read ends at or before `upto`,
        // which is at most the row's length.
        let c = unsafe {
            [
                y.chunk::<L>(i),
                y.chunk::<L>(i + W),
                y.chunk::<L>(i + 2 * W),
                y.chunk::<L>(i + 3 * W),
            ]
        };
        if any_above::<L, 4>([&c[0], &c[1], &c[2], &c[3]], below) {
            break;
        }
        i += 4 * W;
    }
    while i + W <= upto {
        if any_above::<L, 1>([&unsafe { y.chunk::<L>(i) }], below) {
            break;
        }
        i += W;
    }
    (i..upto).find(|&j| y.at(j) == v).unwrap_or(upto)
}

/// Adds |v - uz e| of 16 columns to `t`. The vector builds are written with
/// intrinsics (LLVM splits this loop into 4-lane pieces on its own); the
/// arithmetic is the same, so the lanes are the same bits.
#[inline(always)]
fn tv_step<const L: u8>(t: &mut F, v: &F, e: &F, uz: f32) {
    #[cfg(target_arch = "x86_64")]
    if L >= 2 {
        use std::arch::x86_64::*;
        // SAFETY: level 2 is only instantiated inside functions compiled with
        // AVX-512F, called after run-time detection; loads and stores stay
        // inside the arrays.
        unsafe {
            let d = _mm512_fnmadd_ps(
                _mm512_set1_ps(uz),
                _mm512_loadu_ps(e.as_ptr()),
                _mm512_loadu_ps(v.as_ptr()),
            );
            let a = _mm512_andnot_ps(_mm512_set1_ps(-0.0), d);
            _mm512_storeu_ps(
                t.as_mut_ptr(),
                _mm512_add_ps(_mm512_loadu_ps(t.as_ptr()), a),
            );
        }
        return;
    }
    #[cfg(target_arch = "x86_64")]
    if L == 1 {
        use std::arch::x86_64::*;
        // SAFETY: level 1 is only instantiated inside functions compiled with
        // AVX2 and FMA, called after run-time detection; as above.
        unsafe {
            for h in 0..2 {
                let d = _mm256_fnmadd_ps(
                    _mm256_set1_ps(uz),
                    _mm256_loadu_ps(e.as_ptr().add(8 * h)),
                    _mm256_loadu_ps(v.as_ptr().add(8 * h)),
                );
                let a = _mm256_andnot_ps(_mm256_set1_ps(-0.0), d);
                let tp = t.as_mut_ptr().add(8 * h);
                _mm256_storeu_ps(tp, _mm256_add_ps(_mm256_loadu_ps(tp), a));
            }
        }
        return;
    }
    for j in 0..W {
        t[j] += mul_add::<L>(-uz, e[j], v[j]).abs();
    }
}

/// sum |v - uz e| in f32 lanes per PAIR_BLOCK columns, then in f64, front
/// to back as a fused pass that folds it in walks (see `TvFold`), so both
/// give the same bits. (Taken from the row's end back to its start, where
/// the fused pass has just left v and e in L2, this pass measured 1.02x to
/// 1.03x faster on its own; folded, it is not a pass of its own.)
#[inline(always)]
fn tv_pass<const L: u8>(v: &[f32], e: &[f32], uz: f32) -> f64 {
    let mut acc = [0f64; W];
    for (bv, be) in v.chunks(PAIR_BLOCK).zip(e.chunks(PAIR_BLOCK)) {
        let mut t = [0f32; W];
        let (cv, ce) = (bv.chunks_exact(W), be.chunks_exact(W));
        let (rv, re) = (cv.remainder(), ce.remainder());
        for (vv, ve) in cv.zip(ce) {
            tv_step::<L>(&mut t, load(vv), load(ve), uz);
        }
        if !rv.is_empty() {
            tv_step::<L>(&mut t, &padded(rv, 0.0), &padded(re, 0.0), uz);
        }
        widen_add::<L>(&mut acc, &t);
    }
    hsum64(&acc)
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn fused_impl<const L: u8>(
    x: Row,
    y: Row,
    er: &[f32],
    br: &[f64],
    r: &RowNorm,
    v: &mut [f32],
    bw: &mut [f64],
    ahead: Ahead,
    fold: &mut TvFold,
) -> Option<Fused> {
    let f = with_src!(x, sx => with_src!(y, sy => fused_src::<L, _, _>(sx, sy, er, br, r, v, bw, ahead, fold)));
    // No pass ran (the row went to the two-pass route before one): v is
    // still the one owed on.
    settle_alone::<L>(v, er, fold);
    f
}

#[inline(always)]
fn settle_impl<const L: u8>(v: &[f32], e: &[f32], owed: TvOwed) -> f64 {
    owed.alone::<L>(v, e)
}

dispatched! {
    /// The total variation `owed` over `v` and `e`, summed by its own pass.
    pub fn settle_owed / settle_owed_at(v: &[f32], e: &[f32], owed: TvOwed) -> f64 => settle_impl
}

dispatched! {
    /// KL both ways, total variation and the candidate's summary in one
    /// pass over both rows (see the section comment above). `er` and `br`
    /// are what `normalise_row` stored for the reference `x` (summary `r`);
    /// `v` (>= row length) is scratch; `bw` receives the candidate's block
    /// sums of exp(y - anchor) for the sampler; `ahead` is pulled toward
    /// the cache meanwhile; `fold` hands total variation on from the
    /// previous pass over `v` to the next (`TvFold::default()`: none). None:
    /// take `normalise_row` on the candidate and `compare_stored` instead
    /// (what `fold` owed is settled either way).
    pub fn compare_fused / compare_fused_at(x: Row, y: Row, er: &[f32], br: &[f64], r: &RowNorm, v: &mut [f32], bw: &mut [f64], ahead: Ahead, fold: &mut TvFold) -> Option<Fused> => fused_impl
}

/// Working memory of `compare_pair`, allocated once per worker.
pub struct PairScratch {
    /// v = w - e of the fused pass.
    v: buf::Aligned<f32>,
    /// Block sums of the candidate: exp(y - anchor), summed per NORM_BLOCK columns.
    pub blocks: Vec<f64>,
    // The two-pass route: decoded rows and the candidate's exponentials.
    xd: Vec<f32>,
    yd: Vec<f32>,
    ec: Vec<f32>,
}

impl PairScratch {
    /// The columns' weights in the candidate's block sums (`blocks`) after
    /// `compare_pair` took `route`: exp(y_i - anchor), as the pass summed
    /// them, for the sampler.
    #[inline]
    pub fn weights<'a>(&'a self, er: &'a [f32], route: Route) -> crate::estimators::Stored<'a> {
        use crate::estimators::Stored;
        match route {
            Route::Fused => Stored::Sum(er, &self.v),
            Route::TwoPass => Stored::One(&self.ec),
        }
    }

    /// The total variation a fused pass over this scratch left owed, summed
    /// on its own (`er`: the reference's exponentials it was compared with).
    pub fn settle(&self, er: &[f32], owed: TvOwed) -> f64 {
        settle_owed(&self.v, er, owed)
    }

    pub fn new(cols: usize) -> PairScratch {
        PairScratch {
            v: buf::Aligned::zeroed(cols),
            blocks: vec![0.0; norm_blocks(cols)],
            xd: Vec::new(),
            yd: Vec::new(),
            ec: Vec::new(),
        }
    }
}

/// How `compare_pair` got its result.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Route {
    Fused,
    TwoPass,
}

/// The comparison of one candidate row with the reference row: the fused
/// pass where it holds, else the candidate normalised on its own and
/// compared by `compare_stored` (rows with infinite divergence, a candidate
/// whose maximum is far above its anchor). `x`, `er`, `br`, `r` are the
/// reference row and what `normalise_row` stored for it; `ahead` as in
/// `compare_fused`. Afterwards `s.blocks` holds the candidate's block sums
/// of exp(y - anchor). `fold` as in `compare_fused`: what it owed is
/// settled in every case, and where it asked to defer, a result on the
/// fused route may leave its own total variation owed (`Fused::owed`; the
/// next call over `s` settles it, or `PairScratch::settle`).
#[allow(clippy::too_many_arguments)]
pub fn compare_pair(
    x: Row,
    y: Row,
    er: &[f32],
    br: &[f64],
    r: &RowNorm,
    s: &mut PairScratch,
    ahead: Ahead,
    fold: &mut TvFold,
) -> Result<(Fused, Route), RowFault> {
    if let Some(f) = compare_fused(x, y, er, br, r, &mut s.v, &mut s.blocks, ahead, fold) {
        return Ok((f, Route::Fused));
    }
    two_pass(x, y, er, r, s).map(|f| (f, Route::TwoPass))
}

#[cold]
fn two_pass(
    x: Row,
    y: Row,
    er: &[f32],
    r: &RowNorm,
    s: &mut PairScratch,
) -> Result<Fused, RowFault> {
    let n = x.len();
    for (buf, row) in [(&mut s.xd, x), (&mut s.yd, y)] {
        buf.resize(n, 0.0);
        decode(row, buf);
    }
    s.ec.resize(n, 0.0);
    let c = normalise_store(&s.yd, &mut s.ec, &mut s.blocks)?;
    let m = compare_stored(&s.xd, &s.yd, er, &s.ec, r, &c);
    Ok(Fused {
        m,
        c,
        anchor: c.max,
        owed: None,
    })
}

/// Both summaries and the comparison of two f32 rows (allocates; for tests
/// and tools, the engine keeps its buffers).
pub fn compare_rows(x: &[f32], y: &[f32]) -> Result<(RowNorm, Fused, Route), RowFault> {
    let n = x.len();
    let mut er = vec![0f32; n];
    let mut br = vec![0f64; norm_blocks(n)];
    let r = normalise_store(x, &mut er, &mut br)?;
    let mut s = PairScratch::new(n);
    let (f, route) = compare_pair(
        Row::from_f32(x),
        Row::from_f32(y),
        &er,
        &br,
        &r,
        &mut s,
        Ahead::NONE,
        &mut TvFold::default(),
    )?;
    Ok((r, f, route))
}

// ---------------------------------------------------------------------------
// The storage floor of one row pair (see `floor`).

/// How a storage format rounds: `mantissa_bits` explicit mantissa bits, and
/// 2^`min_exp` the smallest spacing it has (its subnormal step).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Rounding {
    pub mantissa_bits: i32,
    pub min_exp: i32,
}

/// Square of the rounding step at x: 2^(2 max(floor(log2|x|) - bits, min_exp)),
/// and 2^(2 min_exp) at 0 and subnormals. floor(log2|x|) is the f32
/// exponent field; a subnormal's is below every format's limit. In f32, so
/// the exponent is held to [-63, 63]: a step below 2^-63 (a value under
/// 2^-56 in bf16, 2^-40 in f32) counts as 2^-63, whose square, below
/// 1e-38, is nothing beside any real floor, and a step above 2^63 (values
/// beyond 2^70) as 2^63. Infinities and NaN give garbage that the caller
/// masks (their columns carry no mass or are skipped).
#[inline(always)]
fn step_sq(x: f32, r: Rounding) -> f32 {
    let ef = ((x.to_bits() >> 23) & 0xff) as i32;
    let k = (ef - 127 - r.mantissa_bits).max(r.min_exp).clamp(-63, 63);
    f32::from_bits(((2 * k + 127) as u32) << 23)
}

/// 1/2 sum over the columns of a row pair, where p > 0 and y is finite, of
/// p (1 - p) (s_x^2 + s_y^2) / 12, with p = e inv from the reference's
/// exponentials `e` (what the normalising pass stored). Summed in f32 lanes
/// over PAIR_BLOCK columns, then in f64, as the other passes.
#[inline(always)]
fn floor_sum<const L: u8, SX: Src, SY: Src>(
    x: SX,
    rx: Rounding,
    y: SY,
    ry: Rounding,
    inv: f32,
    e: &[f32],
) -> f64 {
    #[inline(always)]
    fn step(x: &F, y: &F, e: &F, inv: f32, rx: Rounding, ry: Rounding, acc: &mut F) {
        for j in 0..W {
            let p = e[j] * inv;
            let w = p * (1.0 - p);
            let v = (step_sq(x[j], rx) + step_sq(y[j], ry)) * (1.0 / 12.0);
            // y finite, tested on its exponent field: the same answer as
            // is_finite, and 5% fewer instructions in this loop (callgrind).
            let ok = p > 0.0 && (y[j].to_bits() & 0x7f80_0000) != 0x7f80_0000;
            acc[j] += if ok { w * v } else { 0.0 };
        }
    }
    let n = x.len();
    assert!(
        y.len() == n && e.len() >= n,
        "storage floor: row lengths differ"
    );
    let mut total = [0f64; W];
    let mut lo = 0;
    while lo < n {
        let hi = (lo + PAIR_BLOCK).min(n);
        let mut acc = [0f32; W];
        let mut c = lo;
        while c + W <= hi {
            // SAFETY: c + 16 <= hi <= n, the length of both rows and at most that of e.
            let (vx, vy, ve) = unsafe { chunks3::<L, SX, SY>(x, y, e, c) };
            step(&vx, &vy, &ve, inv, rx, ry, &mut acc);
            c += W;
        }
        if c < hi {
            let ve = padded(&e[c..hi], 0.0);
            let (vx, vy) = (x.padded(c, hi, NEG_INF), y.padded(c, hi, 0.0));
            step(&vx, &vy, &ve, inv, rx, ry, &mut acc);
        }
        widen_add::<L>(&mut total, &acc);
        lo = hi;
    }
    0.5 * hsum64(&total)
}

/// `storage_floor_row`: the reference normalised (and its exponentials
/// kept) first, then the same sum the streaming pass takes.
#[inline(always)]
fn floor_impl<const L: u8>(x: &[f32], rx: Rounding, y: &[f32], ry: Rounding) -> f64 {
    let n = x.len().min(y.len());
    let xs = row::F32Le(bytemuck::cast_slice(&x[..n]));
    let ys = row::F32Le(bytemuck::cast_slice(&y[..n]));
    let mut e = vec![0f32; n];
    let mut blocks = vec![0f64; norm_blocks(n)];
    match normalise_any::<L, true, _>(
        xs,
        &mut e,
        &mut blocks,
        Ahead::NONE,
        &[],
        &mut TvFold::default(),
    ) {
        Ok(r) => floor_sum::<L, _, _>(xs, rx, ys, ry, (1.0 / r.sum) as f32, &e),
        Err(_) => f64::NAN,
    }
}

#[inline(always)]
fn floor_stored_impl<const L: u8>(
    x: Row,
    rx: Rounding,
    y: Row,
    ry: Rounding,
    e: &[f32],
    r: &RowNorm,
) -> f64 {
    let inv = (1.0 / r.sum) as f32;
    with_src!(x, sx => with_src!(y, sy => floor_sum::<L, _, _>(sx, rx, sy, ry, inv, e)))
}

dispatched! {
    /// `storage_floor_row` of a row pair in stored form whose reference `x`
    /// was normalised by `normalise_row` (summary `r`, exponentials `e`):
    /// the probabilities come from what that pass stored, so the floor costs
    /// one pass and no exp. Rows must have the same length.
    pub fn storage_floor_stored / storage_floor_stored_at(x: Row, rx: Rounding, y: Row, ry: Rounding, e: &[f32], r: &RowNorm) -> f64 => floor_stored_impl
}

dispatched! {
    /// Expected KL that rounding both rows to their storage formats causes:
    /// 1/2 sum p_i (1 - p_i) (s_x(x_i)^2 + s_y(y_i)^2) / 12 over columns with
    /// p_i > 0 and y_i finite, p = softmax(x) (see `floor` for the model).
    /// NaN when x holds a NaN or no finite maximum.
    pub fn storage_floor_row / storage_floor_row_at(x: &[f32], rx: Rounding, y: &[f32], ry: Rounding) -> f64 => floor_impl
}

/// Jensen-Shannon divergence (natural log), in f64 one column at a time. It
/// is opt-in (`--js`) and needs a log per column, so it stays out of the
/// fused pass. Same cancellation-free form as KL: JS = 1/2 KL(p||m) + 1/2 KL(q||m)
/// with log(p/m) = -log1p(expm1(-d)/2).
pub fn js_divergence(x: &[f32], y: &[f32], r: &RowNorm, c: &RowNorm) -> f64 {
    let cst = c.lse - r.lse;
    let mut acc = 0f64;
    for (&xv, &yv) in x.iter().zip(y) {
        let p = (xv as f64 - r.lse).exp();
        let q = (yv as f64 - c.lse).exp();
        if p == 0.0 && q == 0.0 {
            continue;
        }
        let d = (xv as f64 - yv as f64) + cst;
        let m = 0.5 * (p + q);
        let tp = if p == 0.0 {
            m
        } else {
            let u = -(0.5 * (-d).exp_m1()).ln_1p();
            p * (u + (-u).exp_m1())
        };
        let tq = if q == 0.0 {
            m
        } else {
            let u = -(0.5 * d.exp_m1()).ln_1p();
            q * (u + (-u).exp_m1())
        };
        acc += tp + tq;
    }
    0.5 * acc
}

#[inline(always)]
fn top_k_impl<const L: u8>(x: &[f32], k: usize) -> Vec<(u32, f32)> {
    let mut best: Vec<(u32, f32)> = Vec::with_capacity(k + 1);
    if k == 0 {
        return best;
    }
    let offer = |best: &mut Vec<(u32, f32)>, i: usize, v: f32| {
        if v.is_nan() || (best.len() == k && v <= best[k - 1].1) {
            return;
        }
        let pos = best.partition_point(|&(_, b)| b >= v);
        best.insert(pos, (i as u32, v));
        best.truncate(k);
    };
    let chunks = x.chunks_exact(W);
    let tail_at = x.len() - chunks.remainder().len();
    for (ci, c) in chunks.enumerate() {
        // Once the list is full, a chunk with nothing above its last entry is skipped whole.
        if best.len() == k && !any_above::<L, 1>([load(c)], best[k - 1].1) {
            continue;
        }
        for (j, &v) in c.iter().enumerate() {
            offer(&mut best, ci * W + j, v);
        }
    }
    for (i, &v) in x.iter().enumerate().skip(tail_at) {
        offer(&mut best, i, v);
    }
    best
}

dispatched! {
    /// The `k` columns with the highest values, highest first, ties to the lowest id (NaN skipped).
    pub fn top_k / top_k_at(x: &[f32], k: usize) -> Vec<(u32, f32)> => top_k_impl
}

#[cfg(test)]
mod tests;
