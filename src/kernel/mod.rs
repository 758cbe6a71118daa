//! The per-row math: the hot kernel.
//!
//! For each reference row we find the maximum, the log-sum-exp and the
//! entropy (`normalise`), and for each candidate row the same, then one fused
//! pass over both rows (`compare_rows`) gives KL in both directions and the
//! total variation. Everything runs on f32 lanes in fixed blocks whose partial
//! sums are carried in f64, so a 256k-column row loses no precision to
//! accumulation, and the summation order depends only on the row, never on
//! the thread that ran it.
//!
//! KL uses SPEC's cancellation-free form: with d = log p - log q,
//! KL(p||q) = sum p * g(d) with g(d) = d + e^-d - 1 >= 0. For |d| < 0.5 g is
//! evaluated by its Taylor series, which keeps full relative precision for the
//! 1e-7-nat rows that good quantisations produce; beyond it the direct form
//! p*d + q - p has no cancellation to speak of. The difference d itself is
//! taken from the raw logits (x - y, exact when they are close) plus one
//! constant computed in f64, not from two rounded log-probabilities.

pub mod exp;

use exp::exp_f32;

/// Columns per partial-sum block of the normalising pass; also the block
/// granularity the sampler walks (see `estimators`).
pub const NORM_BLOCK: usize = 64;
const PAIR_BLOCK: usize = 256;
const LANES: usize = 8;

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
#[derive(Debug, Clone, Copy)]
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
#[derive(Debug, Clone, Copy, Default)]
pub struct PairMetrics {
    pub kl: f64,
    pub kl_reverse: f64,
    pub tv: f64,
}

/// Finds the maximum and checks the row for faults.
#[inline(always)]
fn scan_max(x: &[f32]) -> (f32, bool) {
    let mut m = [f32::NEG_INFINITY; LANES];
    let mut bad = [false; LANES];
    let chunks = x.chunks_exact(LANES);
    let tail = chunks.remainder();
    for c in chunks {
        for j in 0..LANES {
            let v = c[j];
            m[j] = if v > m[j] { v } else { m[j] };
            bad[j] |= v != v;
        }
    }
    let mut mx = f32::NEG_INFINITY;
    let mut nan = false;
    for j in 0..LANES {
        mx = if m[j] > mx { m[j] } else { mx };
        nan |= bad[j];
    }
    for &v in tail {
        mx = if v > mx { v } else { mx };
        nan |= v != v;
    }
    (mx, nan)
}

/// Sums exp(x - m) and (x - m) exp(x - m) over the row, storing the first sum
/// of every NORM_BLOCK columns into `blocks` (len = ceil(n / NORM_BLOCK)).
#[inline(always)]
fn sum_exp_blocks(x: &[f32], m: f32, blocks: &mut [f64]) -> (f64, f64) {
    let mut s_tot = 0f64;
    let mut t_tot = 0f64;
    for (bi, blk) in x.chunks(NORM_BLOCK).enumerate() {
        let mut s = [0f32; LANES];
        let mut t = [0f32; LANES];
        let chunks = blk.chunks_exact(LANES);
        let tail = chunks.remainder();
        for c in chunks {
            for j in 0..LANES {
                let a = c[j] - m;
                let e = exp_f32(a);
                s[j] += e;
                // a = -inf gives e = 0; keep the product 0 rather than NaN.
                t[j] += if e > 0.0 { a * e } else { 0.0 };
            }
        }
        let mut sb = 0f32;
        let mut tb = 0f32;
        for &v in tail {
            let a = v - m;
            let e = exp_f32(a);
            sb += e;
            tb += if e > 0.0 { a * e } else { 0.0 };
        }
        for j in 0..LANES {
            sb += s[j];
            tb += t[j];
        }
        blocks[bi] = sb as f64;
        s_tot += sb as f64;
        t_tot += tb as f64;
    }
    (s_tot, t_tot)
}

#[inline(always)]
fn normalise_impl(x: &[f32], blocks: &mut [f64]) -> Result<RowNorm, RowFault> {
    let (max, nan) = scan_max(x);
    if nan {
        return Err(RowFault::Nan);
    }
    if max == f32::INFINITY {
        return Err(RowFault::PosInf);
    }
    if max == f32::NEG_INFINITY {
        return Err(RowFault::AllNegInf);
    }
    let argmax = x.iter().position(|&v| v == max).unwrap_or(0) as u32;
    let (s, t) = sum_exp_blocks(x, max, blocks);
    let ln_s = s.ln();
    Ok(RowNorm { max, argmax, lse: max as f64 + ln_s, sum: s, entropy: ln_s - t / s })
}

/// g(d) / d^2 for |d| < 0.5: the Taylor series of (d + e^-d - 1) / d^2,
/// truncated after d^6 (the next term is below 6e-8 relative at |d| = 0.5).
#[inline(always)]
fn g_over_d2(d: f32) -> f32 {
    const C: [f32; 7] = [
        1.0 / 2.0,
        -1.0 / 6.0,
        1.0 / 24.0,
        -1.0 / 120.0,
        1.0 / 720.0,
        -1.0 / 5040.0,
        1.0 / 40320.0,
    ];
    let mut y = C[6];
    y = y * d + C[5];
    y = y * d + C[4];
    y = y * d + C[3];
    y = y * d + C[2];
    y = y * d + C[1];
    y * d + C[0]
}

/// The contribution of one column to (KL(p||q), KL(q||p), |p - q|).
#[inline(always)]
fn pair_terms(x: f32, y: f32, lr: f32, lc: f32, c: f32) -> (f32, f32, f32) {
    let p = exp_f32(x - lr);
    let q = exp_f32(y - lc);
    let d = (x - y) + c;
    let d2 = d * d;
    let small = d.abs() < 0.5;
    let fwd_direct = p * d + (q - p);
    let rev_direct = (p - q) - q * d;
    let gd = d2 * g_over_d2(d);
    let fwd_series = p * gd;
    let rev_series = q * (d2 * g_over_d2(-d));
    // |p - q| = p |e^-d - 1| = p |g(d) - d|: for close rows this avoids
    // subtracting two separately rounded probabilities.
    let tv = if small { p * (gd - d).abs() } else { (p - q).abs() };
    let fwd = if small { fwd_series } else { fwd_direct };
    let rev = if small { rev_series } else { rev_direct };
    // Where one side has no mass the sum picks up the other side's mass
    // (SPEC: "+ candidate mass where p is zero"); both zero gives 0.
    let fwd = if p == 0.0 { q } else { fwd };
    let rev = if q == 0.0 { p } else { rev };
    let tv = if p == 0.0 || q == 0.0 { (p - q).abs() } else { tv };
    (fwd, rev, tv)
}

#[inline(always)]
fn compare_impl(x: &[f32], y: &[f32], r: &RowNorm, c: &RowNorm) -> PairMetrics {
    let lr = r.lse as f32;
    let lc = c.lse as f32;
    // d = (x - lse_r) - (y - lse_c) = (x - y) + (lse_c - lse_r); the constant in f64.
    // Its rounding is a uniform shift of d, to which the sum is insensitive to first order.
    let cst = (c.lse - r.lse) as f32;
    let mut out = PairMetrics::default();
    for (bx, by) in x.chunks(PAIR_BLOCK).zip(y.chunks(PAIR_BLOCK)) {
        let mut f = [0f32; LANES];
        let mut b = [0f32; LANES];
        let mut t = [0f32; LANES];
        let cx = bx.chunks_exact(LANES);
        let cy = by.chunks_exact(LANES);
        let (tx, ty) = (cx.remainder(), cy.remainder());
        for (vx, vy) in cx.zip(cy) {
            for j in 0..LANES {
                let (a, bb, cc) = pair_terms(vx[j], vy[j], lr, lc, cst);
                f[j] += a;
                b[j] += bb;
                t[j] += cc;
            }
        }
        let (mut fs, mut bs, mut ts) = (0f32, 0f32, 0f32);
        for (&vx, &vy) in tx.iter().zip(ty) {
            let (a, bb, cc) = pair_terms(vx, vy, lr, lc, cst);
            fs += a;
            bs += bb;
            ts += cc;
        }
        for j in 0..LANES {
            fs += f[j];
            bs += b[j];
            ts += t[j];
        }
        out.kl += fs as f64;
        out.kl_reverse += bs as f64;
        out.tv += ts as f64;
    }
    out.tv *= 0.5;
    out
}

// Runtime dispatch: the same source compiled once for the baseline target and
// once with AVX2 enabled, chosen per call by a cached CPU feature check. The
// arithmetic is identical (Rust never fuses multiply-add on its own), so the
// two paths give bit-identical results.
macro_rules! dispatched {
    ($(#[$m:meta])* pub fn $name:ident($($a:ident: $t:ty),*) -> $r:ty => $imp:ident) => {
        $(#[$m])*
        pub fn $name($($a: $t),*) -> $r {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                unsafe fn wide($($a: $t),*) -> $r { $imp($($a),*) }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the feature was detected at run time just above.
                    return unsafe { wide($($a),*) };
                }
            }
            $imp($($a),*)
        }
    };
}

dispatched! {
    /// Log-softmax summary of one row; `blocks` receives the block sums of
    /// exp(x - max) that the sampler uses (len = ceil(len / NORM_BLOCK)).
    pub fn normalise(x: &[f32], blocks: &mut [f64]) -> Result<RowNorm, RowFault> => normalise_impl
}

dispatched! {
    /// KL both ways and total variation between two normalised rows.
    pub fn compare_rows(x: &[f32], y: &[f32], r: &RowNorm, c: &RowNorm) -> PairMetrics => compare_impl
}

/// Number of NORM_BLOCK blocks of a row of `cols` columns.
pub fn norm_blocks(cols: usize) -> usize {
    cols.div_ceil(NORM_BLOCK)
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

/// The `k` columns with the highest values, highest first, ties to the lowest id.
pub fn top_k(x: &[f32], k: usize) -> Vec<(u32, f32)> {
    let mut best: Vec<(u32, f32)> = Vec::with_capacity(k + 1);
    for (i, &v) in x.iter().enumerate() {
        if v != v {
            continue;
        }
        if best.len() == k && !(v > best[k - 1].1) {
            continue;
        }
        let pos = best.partition_point(|&(_, b)| b >= v);
        best.insert(pos, (i as u32, v));
        best.truncate(k);
    }
    best
}

#[cfg(test)]
mod tests;
