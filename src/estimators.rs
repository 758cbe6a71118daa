//! Sampled KL estimators k1, k2, k3 (SPEC, "Sampled estimators").
//!
//! Monitoring code that cannot keep full logits draws tokens x ~ p and only
//! keeps log p(x) and log q(x). With log r = log q(x) - log p(x):
//! k1 = -log r (unbiased, noisy, can be negative), k2 = (log r)^2 / 2 (biased,
//! quiet when p and q are close), k3 = (r - 1) - log r (unbiased, never
//! negative). We draw from the exact rows so each estimate can be set beside
//! the exact value on the same positions.
//!
//! Draws are reproducible whatever the thread count: the uniforms come from a
//! counter-based generator keyed by (seed, row, direction, draw), and tokens
//! by inverse CDF over the row, walking the block sums the normalising pass
//! already left behind and then the columns of one block.
//!
//! log r is taken from the logits and the kernel's log-sum-exp of each row
//! (f32 lanes, f64 carry). The constant (lse_q - lse_p) it adds errs by about
//! 3e-8 rms per row and 1e-9 on average (measured against an f64 log-sum-exp
//! on random rows of 32k to 152k columns); k1 inherits the average as a bias,
//! k3 only at second order, since E_p[r] = 1. Both are far below the sampling
//! noise of any feasible number of positions.

use crate::kernel::lanes::{hsum64, W};
use crate::kernel::{Row, NORM_BLOCK};
use serde::{Deserialize, Serialize};

/// The three per-draw values for a given log r.
///
/// k3 = e^l - 1 - l loses relative precision to cancellation when l is small
/// (the error of the direct form is about 2 eps / |l| relative), and a
/// rounding of the direct form could even come out a hair below zero. Below
/// |l| = 0.01 it is summed as its Taylor series l^2 (1/2 + l/3! + ... + l^5/7!),
/// whose first omitted term is below 5e-17 relative there, and which is a
/// square times a positive factor, so k3 is never negative.
#[inline]
pub fn k_values(log_r: f64) -> [f64; 3] {
    [-log_r, 0.5 * log_r * log_r, k3_value(log_r)]
}

/// (r - 1) - log r for a given log r; 0 <= k3, +inf when log r = -inf.
#[inline]
pub fn k3_value(l: f64) -> f64 {
    if l.abs() < 0.01 {
        const C: [f64; 6] = [
            1.0 / 2.0,
            1.0 / 6.0,
            1.0 / 24.0,
            1.0 / 120.0,
            1.0 / 720.0,
            1.0 / 5040.0,
        ];
        let mut y = C[5];
        for c in C[..5].iter().rev() {
            y = y * l + c;
        }
        l * l * y
    } else {
        l.exp_m1() - l
    }
}

/// SplitMix64 finaliser (Steele, Lea and Flood 2014; common practice): a
/// bijective mix, used as a counter-based generator.
#[inline]
pub fn mix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Uniform in [0, 1) for draw `j` of `row` in `direction` (0 forward, 1 reverse).
#[inline]
pub fn uniform(seed: u64, row: u64, direction: u64, j: u64) -> f64 {
    let key = mix64(mix64(mix64(seed) ^ row) ^ (direction << 32 | j));
    (key >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
}

/// Draws `out.len()` tokens from softmax(x) by inverse CDF. `blocks` holds
/// the sums of exp(x - max) per NORM_BLOCK columns, as left by
/// `kernel::normalise`. `s` is reusable scratch.
#[allow(clippy::too_many_arguments)]
pub fn draw_tokens(
    x: Row,
    max: f32,
    blocks: &[f64],
    seed: u64,
    row: u64,
    direction: u64,
    s: &mut DrawScratch,
    out: &mut [u32],
) {
    let w = |i: usize| crate::kernel::exp::exp_f32(x.get(i) - max);
    draw_weighted(w, x.len(), blocks, seed, row, direction, s, out)
}

/// Reusable memory of the draws: the sorted uniforms and the running sums of
/// the block sums.
#[derive(Debug, Default)]
pub struct DrawScratch {
    order: Vec<(f64, usize)>,
    prefix: Vec<f64>,
}

/// Column weights of the draws' walk: column i's unnormalised probability,
/// and the f64 sum of the CHUNK columns from `lo` by the kernel's fixed tree
/// (`lanes::hsum64`), which the walk takes most often.
pub trait Weights {
    fn at(&self, i: usize) -> f32;

    #[inline(always)]
    fn chunk_sum(&self, lo: usize) -> f64 {
        chunk_total(&std::array::from_fn(|j| self.at(lo + j)))
    }
}

/// The f64 sum of one chunk's weights by the kernel's fixed tree: the one
/// order every `Weights` sums a chunk in.
#[inline(always)]
fn chunk_total(w: &[f32; CHUNK]) -> f64 {
    hsum64(&std::array::from_fn(|j| w[j] as f64))
}

/// Weights computed column by column (`draw_tokens`, tests).
impl<F: Fn(usize) -> f32> Weights for F {
    #[inline(always)]
    fn at(&self, i: usize) -> f32 {
        self(i)
    }
}

/// Weights the kernel stored: the reference's exponentials, or the
/// candidate's where the two-pass route made them; or, on the fused route,
/// the candidate's as the sum of two stored rows, e + v, in f32 as the pass
/// summed them. Read as slices, a chunk's sum takes one bounds check per
/// slice and vector loads and conversions; through a closure it took a
/// check, a scalar load (two for e + v) and a conversion per column
/// (`draw_16` in the kernel benchmark 1.6 -> 1.5 us; see DEVELOPERS.md,
/// "Estimators").
#[derive(Debug, Clone, Copy)]
pub enum Stored<'a> {
    One(&'a [f32]),
    Sum(&'a [f32], &'a [f32]),
}

impl Weights for Stored<'_> {
    #[inline(always)]
    fn at(&self, i: usize) -> f32 {
        match *self {
            Stored::One(a) => a[i],
            Stored::Sum(a, b) => a[i] + b[i],
        }
    }

    #[inline(always)]
    fn chunk_sum(&self, lo: usize) -> f64 {
        let chunk = |r: &[f32]| -> [f32; CHUNK] { r[lo..lo + CHUNK].try_into().unwrap() };
        let w = match *self {
            Stored::One(a) => chunk(a),
            Stored::Sum(a, b) => {
                let (a, b) = (chunk(a), chunk(b));
                std::array::from_fn(|j| a[j] + b[j])
            }
        };
        chunk_total(&w)
    }
}

/// `draw_tokens` from the weights themselves: `weight.at(i)` is column i's
/// unnormalised probability and `blocks` the sums of those weights per
/// NORM_BLOCK columns (the engine passes the exponentials the kernel
/// stored, so nothing is recomputed).
#[allow(clippy::too_many_arguments)]
pub fn draw_weighted(
    weight: impl Weights,
    cols: usize,
    blocks: &[f64],
    seed: u64,
    row: u64,
    direction: u64,
    s: &mut DrawScratch,
    out: &mut [u32],
) {
    let prefix = &mut s.prefix;
    block_prefix(blocks, prefix);
    let total = prefix[blocks.len()];
    let order = &mut s.order;
    order.clear();
    order.extend((0..out.len()).map(|j| (uniform(seed, row, direction, j as u64) * total, j)));
    order.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
    // One walk over the blocks serves all draws, in increasing order of u,
    // and inside a block it goes on from the chunk where the previous draw
    // stopped (most draws land in the few blocks that hold the top tokens),
    // adding the same terms in the same order as a walk from the block's
    // start. That order (chunk sums, then columns) differs from a plain
    // column-by-column walk only in rounding: the two pick different tokens
    // only where u falls within rounding of a boundary between two.
    let mut bi = 0usize;
    let mut walk: Option<Walk> = None;
    for &(u, j) in order.iter() {
        // The draw's block: the first from here whose end (prefix[bi + 1])
        // passes u, else the last. (A scan: the draws are sorted, so all of
        // them together pass each block once; a binary search per draw
        // measured slower.) The running sums never decrease (`block_prefix`),
        // so where the end of the block SKIP blocks on has not passed u,
        // none before it has: the scan moves SKIP blocks in one test and
        // stops where the one-block scan would (a NaN block makes every
        // later sum NaN, and a NaN end is never skipped over).
        const SKIP: usize = 8;
        while bi + SKIP < blocks.len() && prefix[bi + SKIP] <= u {
            bi += SKIP;
        }
        while bi + 1 < blocks.len() && prefix[bi + 1] <= u {
            bi += 1;
        }
        let lo = bi * NORM_BLOCK;
        let hi = (lo + NORM_BLOCK).min(cols);
        let w = match walk {
            Some(ref mut w) if w.block == bi => w,
            _ => walk.insert(Walk {
                block: bi,
                next: lo,
                sum: prefix[bi],
                last_mass: None,
            }),
        };
        // Whole chunks of CHUNK columns whose sum keeps the running sum at or
        // below u are passed in one step: a block holds NORM_BLOCK (256)
        // columns, and walked one column at a time it was most of a draw's
        // cost (`draw_16` 4.8 us against 2.2 with chunks).
        while w.next + CHUNK <= hi {
            let cs = weight.chunk_sum(w.next);
            if w.sum + cs > u {
                break;
            }
            if cs > 0.0 {
                w.last_mass = Some(w.next);
            }
            w.sum += cs;
            w.next += CHUNK;
        }
        // Then column by column through the chunk that passes u (or the
        // block's last, shorter one), from its start: the walk stays at that
        // chunk for the next draw, so every draw adds the same terms in the
        // same order as a walk from the block's start.
        let end = (w.next + CHUNK).min(hi);
        let mut sum = w.sum;
        let (mut pick, mut last) = (None, None);
        for i in w.next..end {
            let e = weight.at(i) as f64;
            if e > 0.0 {
                last = Some(i);
                if sum + e > u {
                    pick = Some(i);
                    break;
                }
                sum += e;
            }
        }
        // Rounding between the block sums and this walk can leave u just
        // past the chunk's or the block's end: the last token with mass
        // before it is the right answer.
        let pick = pick.or(last).unwrap_or_else(|| {
            w.last_mass
                .and_then(|c| (c..c + CHUNK).rev().find(|&i| weight.at(i) > 0.0))
                .unwrap_or(lo)
        });
        out[j] = pick as u32;
    }
}

/// Columns per chunk of the draws' walk inside a block: one kernel lane set.
const CHUNK: usize = W;

/// The running sums of `blocks` into `prefix` (resized to blocks.len() + 1):
/// prefix[b] is the sum of the blocks before b, prefix[len] the total.
///
/// A running sum is a chain of dependent additions (about 2,000 of them at a
/// 128k vocabulary, most of a draw's cost), so the blocks are cut into four
/// runs summed side by side, and each run's start added afterwards. The
/// result depends only on `blocks`; with non-negative blocks it never
/// decreases.
pub fn block_prefix(blocks: &[f64], prefix: &mut Vec<f64>) {
    const RUNS: usize = 4;
    let n = blocks.len();
    prefix.resize(n + 1, 0.0);
    prefix[0] = 0.0;
    let len = n.div_ceil(RUNS);
    let out = &mut prefix[1..];
    // Local running sums of the four runs, interleaved so the four chains
    // overlap.
    let mut acc = [0f64; RUNS];
    for i in 0..len {
        for (r, a) in acc.iter_mut().enumerate() {
            let at = r * len + i;
            if at < n {
                *a += blocks[at];
                out[at] = *a;
            }
        }
    }
    // Each run's start: the total of the runs before it.
    let mut start = 0f64;
    for r in 0..RUNS {
        let (lo, hi) = ((r * len).min(n), ((r + 1) * len).min(n));
        if r > 0 {
            for p in &mut out[lo..hi] {
                *p += start;
            }
        }
        if hi > lo {
            start = out[hi - 1];
        }
    }
}

/// Where the inverse-CDF walk inside one block stands.
struct Walk {
    block: usize,
    /// The chunk the walk stands at (its first column), and the sum of
    /// everything before it.
    next: usize,
    sum: f64,
    /// The last chunk passed that holds mass.
    last_mass: Option<usize>,
}

/// Sums over positions for one (samples-per-position, direction) block.
///
/// A position whose exact divergence is infinite (the other model gives zero
/// probability to a token this one allows) cannot be set beside an estimate:
/// its error is inf - inf. Such positions are left out of every sum, so one
/// of them does not turn the whole block into NaN; the block's `positions`
/// (= `n`) then falls short of the counted positions by their number, and the
/// report counts them in `infinite_kl` and warns. An estimate can only be
/// infinite where the exact value is, so nothing finite is dropped.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct EstimatorSums {
    pub n: f64,
    pub exact: f64,
    /// Per k: sum of per-position estimates, of their squares, of squared errors.
    pub sum: [f64; 3],
    pub sum_sq: [f64; 3],
    pub sum_err_sq: [f64; 3],
}

impl EstimatorSums {
    pub fn add(&mut self, exact: f64, est: &[f64; 3]) {
        if !exact.is_finite() || est.iter().any(|e| !e.is_finite()) {
            return;
        }
        self.n += 1.0;
        self.exact += exact;
        for (k, &e) in est.iter().enumerate() {
            self.sum[k] += e;
            self.sum_sq[k] += e * e;
            self.sum_err_sq[k] += (e - exact) * (e - exact);
        }
    }

    pub fn merge(&mut self, o: &EstimatorSums) {
        self.n += o.n;
        self.exact += o.exact;
        for k in 0..3 {
            self.sum[k] += o.sum[k];
            self.sum_sq[k] += o.sum_sq[k];
            self.sum_err_sq[k] += o.sum_err_sq[k];
        }
    }

    /// The report entry of estimator `k` (0, 1, 2 for k1, k2, k3); `scale`
    /// converts nats to the report's units.
    pub fn summary(&self, k: usize, scale: f64) -> KSummary {
        let n = self.n;
        if n == 0.0 {
            let nan = f64::NAN;
            return KSummary {
                mean: nan,
                bias: nan,
                std: nan,
                rmse: nan,
                positions_for_10pct: nan,
            };
        }
        let mean = self.sum[k] / n;
        let exact = self.exact / n;
        // Sample variance from the running sums. The cancellation in
        // sum_sq/n - mean^2 costs about eps * mean^2 / var relative, harmless
        // here: the per-position spread of every estimator is of the order of
        // its mean or larger (std/mean is 1.4 and more in the Gaussian case).
        let var = (self.sum_sq[k] / n - mean * mean).max(0.0) * n / (n - 1.0).max(1.0);
        let std = var.sqrt();
        let rel = 0.1 * exact.abs();
        let need = if rel > 0.0 {
            (crate::stats::Z95 * std / rel).powi(2).ceil().max(1.0)
        } else {
            f64::INFINITY
        };
        KSummary {
            mean: mean * scale,
            bias: (mean - exact) * scale,
            std: std * scale,
            rmse: (self.sum_err_sq[k] / n).sqrt() * scale,
            positions_for_10pct: need,
        }
    }
}

/// SPEC's per-estimator report entry.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct KSummary {
    /// Mean of the per-position estimates.
    pub mean: f64,
    /// mean - exact mean on the same positions.
    pub bias: f64,
    /// Standard deviation across positions of the per-position estimate (the
    /// mean of its draws). It holds the sampling noise and the spread of the
    /// exact values between positions alike: it is what a run that logs only
    /// sampled log-probabilities sees, and what its standard error is made of.
    pub std: f64,
    /// Root mean square of (estimate - exact) per position.
    pub rmse: f64,
    /// Positions needed for a 95% interval of +-10% of the exact mean,
    /// (z * std / (0.1 * exact))^2, positions taken as independent. It sizes
    /// the interval only: k2's bias does not shrink with more positions, and
    /// where it exceeds 10% (at KL near 0.5 nats and beyond) no number of
    /// positions brings k2 within 10%; read it beside `bias`.
    pub positions_for_10pct: f64,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Inverse CDF the plain way, each draw walked column by column from the
    /// start of its block (common practice); the continuing, chunked walk
    /// must pick the same tokens (it adds in another order, so it could
    /// differ where a draw falls within rounding of a boundary, which
    /// random draws do not meet).
    fn draws_from_block_start(x: &[f32], max: f32, blocks: &[f64], us: &[f64]) -> Vec<u32> {
        us.iter()
            .map(|&u| {
                let mut prefix = Vec::new();
                block_prefix(blocks, &mut prefix);
                let mut bi = 0usize;
                while bi + 1 < blocks.len() && prefix[bi + 1] <= u {
                    bi += 1;
                }
                let acc = prefix[bi];
                let lo = bi * NORM_BLOCK;
                let hi = (lo + NORM_BLOCK).min(x.len());
                let (mut a, mut last) = (acc, lo);
                for (i, &v) in x.iter().enumerate().take(hi).skip(lo) {
                    let e = crate::kernel::exp::exp_f32(v - max) as f64;
                    if e > 0.0 {
                        last = i;
                        a += e;
                        if a > u {
                            return i as u32;
                        }
                    }
                }
                last as u32
            })
            .collect()
    }

    /// The stored weights read as slices give the bits of the same weights
    /// read column by column through a closure: each chunk's sum, and so
    /// every token drawn.
    #[test]
    fn stored_weights_draw_what_a_closure_over_them_draws() {
        let cols = 3 * NORM_BLOCK + 40;
        let mut st = 11u64;
        let mut next = || {
            st += 1;
            (mix64(st) >> 40) as f32 / (1u64 << 24) as f32
        };
        let a: Vec<f32> = (0..cols).map(|_| next() * next() * next()).collect();
        // v = w - e of a fused pass: of either sign, never below -e.
        let b: Vec<f32> = a.iter().map(|&e| e * (next() - 0.5)).collect();
        for lo in (0..cols - CHUNK).step_by(7) {
            let one = |i: usize| a[i];
            let sum = |i: usize| a[i] + b[i];
            assert_eq!(
                Stored::One(&a).chunk_sum(lo).to_bits(),
                one.chunk_sum(lo).to_bits()
            );
            assert_eq!(
                Stored::Sum(&a, &b).chunk_sum(lo).to_bits(),
                sum.chunk_sum(lo).to_bits()
            );
        }
        let blocks = |w: &dyn Fn(usize) -> f32| -> Vec<f64> {
            (0..cols.div_ceil(NORM_BLOCK))
                .map(|k| {
                    (k * NORM_BLOCK..((k + 1) * NORM_BLOCK).min(cols))
                        .map(|i| w(i) as f64)
                        .sum()
                })
                .collect()
        };
        let (bo, bs) = (blocks(&|i| a[i]), blocks(&|i| a[i] + b[i]));
        let mut s = DrawScratch::default();
        let (mut x, mut y) = ([0u32; 64], [0u32; 64]);
        for row in 0..20 {
            draw_weighted(Stored::One(&a), cols, &bo, 3, row, 0, &mut s, &mut x);
            draw_weighted(|i: usize| a[i], cols, &bo, 3, row, 0, &mut s, &mut y);
            assert_eq!(x, y);
            draw_weighted(Stored::Sum(&a, &b), cols, &bs, 3, row, 1, &mut s, &mut x);
            draw_weighted(|i: usize| a[i] + b[i], cols, &bs, 3, row, 1, &mut s, &mut y);
            assert_eq!(x, y);
        }
    }

    #[test]
    fn block_prefix_is_the_running_sum() {
        // Whole numbers add exactly in f64 in any order, so the four-run sums
        // must equal the plain running sum; and on arbitrary non-negative
        // blocks they never decrease and end at the total (to rounding).
        for n in [0usize, 1, 3, 4, 5, 7, 64, 2004, 2005] {
            let ints: Vec<f64> = (0..n).map(|i| ((i * 37) % 11) as f64).collect();
            let mut p = Vec::new();
            block_prefix(&ints, &mut p);
            let mut run = 0.0;
            let mut want = vec![0.0];
            for &b in &ints {
                run += b;
                want.push(run);
            }
            assert_eq!(p, want, "n={n}");
            let spread: Vec<f64> = (0..n)
                .map(|i| ((i as f64 * 0.7).sin().abs() * 30.0).exp() * 1e-9)
                .collect();
            block_prefix(&spread, &mut p);
            assert!(p.windows(2).all(|w| w[0] <= w[1]), "n={n}: decreases");
            let total: f64 = spread.iter().sum();
            assert!((p[n] - total).abs() <= 1e-12 * total, "n={n}");
        }
    }

    #[test]
    fn continuing_walk_picks_what_a_walk_from_the_block_start_picks() {
        let mut st = 99u64;
        let mut next = || {
            st = st
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((st >> 11) as f64) / ((1u64 << 53) as f64)
        };
        for &(n, spread) in &[(1000usize, 1.0f64), (5000, 6.0), (130, 20.0)] {
            let mut x: Vec<f32> = (0..n).map(|_| (spread * next()) as f32).collect();
            x[n / 3] = f32::NEG_INFINITY;
            x[n / 2] = spread as f32 * 2.0;
            let mut blocks = vec![0f64; crate::kernel::norm_blocks(n)];
            let r = crate::kernel::normalise(&x, &mut blocks).unwrap();
            for draws in [1usize, 16, 300] {
                let mut order = DrawScratch::default();
                let mut out = vec![0u32; draws];
                draw_tokens(
                    Row::from_f32(&x),
                    r.max,
                    &blocks,
                    5,
                    7,
                    0,
                    &mut order,
                    &mut out,
                );
                let mut prefix = Vec::new();
                block_prefix(&blocks, &mut prefix);
                let total = prefix[blocks.len()];
                let us: Vec<f64> = (0..draws)
                    .map(|j| uniform(5, 7, 0, j as u64) * total)
                    .collect();
                assert_eq!(
                    out,
                    draws_from_block_start(&x, r.max, &blocks, &us),
                    "n={n} draws={draws}"
                );
            }
        }
    }

    #[test]
    fn k3_is_never_negative() {
        for i in -2000..2000 {
            let lr = i as f64 * 0.01;
            assert!(k_values(lr)[2] >= 0.0, "log r = {lr}");
        }
        // Down to the smallest magnitudes, both signs.
        let mut lr = 1.0f64;
        while lr > 1e-300 {
            for l in [lr, -lr] {
                let k3 = k_values(l)[2];
                assert!(k3 >= 0.0, "log r = {l}");
                // l^2/2 is the leading term; relative agreement to l/3 (series).
                if l.abs() < 1e-3 {
                    let lead = 0.5 * l * l;
                    assert!(
                        (k3 - lead).abs() <= lead * (l.abs() / 2.0) + f64::MIN_POSITIVE,
                        "log r = {l}: {k3}"
                    );
                }
            }
            lr *= 0.37;
        }
        assert_eq!(k_values(f64::NEG_INFINITY)[2], f64::INFINITY);
    }

    #[test]
    fn k3_series_joins_the_direct_form() {
        // At the switch point the two forms agree to the direct form's
        // 2 eps / |l| (about 4e-14 relative at |l| = 0.01).
        for l in [0.01f64, -0.01, 0.0099999, -0.0099999] {
            let direct = l.exp_m1() - l;
            let series = {
                let mut t = 0.0;
                let mut f = 1.0;
                for k in 2..12 {
                    f *= k as f64;
                    t += l.powi(k) / f;
                }
                t
            };
            assert!((k3_value(l) - series).abs() < 5e-14 * series, "{l}");
            assert!((direct - series).abs() < 5e-14 * series, "{l}");
        }
    }

    #[test]
    fn draws_follow_the_distribution_across_blocks() {
        // 1000 tokens in 16 blocks, with a block of -inf in the middle and a
        // peak in the last block; grouped frequencies against a chi-square
        // bound (df = 9, P(chi2 > 33.7) < 1e-4; common practice).
        let v = 1000usize;
        let mut x: Vec<f32> = (0..v)
            .map(|i| ((i * 7919 % 1000) as f32 / 250.0).sin() * 2.0)
            .collect();
        for xi in x.iter_mut().take(320).skip(256) {
            *xi = f32::NEG_INFINITY;
        }
        x[997] = 4.0;
        let mx = x.iter().cloned().fold(f32::NEG_INFINITY, f32::max);
        let mut blocks = vec![0f64; crate::kernel::norm_blocks(v)];
        crate::kernel::normalise(&x, &mut blocks).unwrap();
        let e: Vec<f64> = x.iter().map(|&a| ((a - mx) as f64).exp()).collect();
        let z: f64 = e.iter().sum();
        let n = 200_000usize;
        let mut out = vec![0u32; n];
        let mut order = DrawScratch::default();
        draw_tokens(
            Row::from_f32(&x),
            mx,
            &blocks,
            7,
            3,
            0,
            &mut order,
            &mut out,
        );
        assert!(
            out.iter().all(|&t| !(256..320).contains(&(t as usize))),
            "drew a token of probability 0"
        );
        // Ten groups of 100 columns.
        let mut chi2 = 0.0;
        for g in 0..10 {
            let p: f64 = e[g * 100..(g + 1) * 100].iter().sum::<f64>() / z;
            let f = out.iter().filter(|&&t| t as usize / 100 == g).count() as f64;
            if p > 0.0 {
                chi2 += (f - n as f64 * p).powi(2) / (n as f64 * p);
            }
        }
        assert!(chi2 < 33.7, "chi2 = {chi2}");
        let p997 = e[997] / z;
        let f997 = out.iter().filter(|&&t| t == 997).count() as f64 / n as f64;
        assert!((f997 - p997).abs() < 5.0 * (p997 * (1.0 - p997) / n as f64).sqrt());
    }

    #[test]
    fn draws_are_nested_and_keyed_by_counter() {
        // The first 4 of 16 draws are the 4 draws of a budget of 4: budgets are nested.
        let x: Vec<f32> = (0..300).map(|i| (i as f32 * 0.37).cos()).collect();
        let mx = x.iter().cloned().fold(f32::NEG_INFINITY, f32::max);
        let mut blocks = vec![0f64; crate::kernel::norm_blocks(x.len())];
        crate::kernel::normalise(&x, &mut blocks).unwrap();
        let mut order = DrawScratch::default();
        let (mut a, mut b) = (vec![0u32; 16], vec![0u32; 4]);
        draw_tokens(Row::from_f32(&x), mx, &blocks, 1, 9, 0, &mut order, &mut a);
        draw_tokens(Row::from_f32(&x), mx, &blocks, 1, 9, 0, &mut order, &mut b);
        assert_eq!(&a[..4], &b[..]);
        let mut c = vec![0u32; 16];
        draw_tokens(Row::from_f32(&x), mx, &blocks, 1, 10, 0, &mut order, &mut c);
        assert_ne!(a, c, "another row draws other tokens");
    }

    #[test]
    fn infinite_positions_are_left_out() {
        let mut s = EstimatorSums::default();
        s.add(0.5, &[0.4, 0.6, 0.5]);
        s.add(0.7, &[0.8, 0.6, 0.7]);
        s.add(f64::INFINITY, &[0.1, 0.1, 0.1]);
        s.add(f64::INFINITY, &[f64::INFINITY; 3]);
        assert_eq!(s.n, 2.0);
        let k = s.summary(2, 1.0);
        assert!((k.mean - 0.6).abs() < 1e-12 && k.bias.abs() < 1e-12 && k.rmse == 0.0);
    }

    #[test]
    fn draws_follow_the_distribution() {
        // Three tokens with p = (0.5, 0.3, 0.2), many draws: frequencies within
        // 5 binomial standard errors (common practice).
        let x: Vec<f32> = [0.5f32, 0.3, 0.2].iter().map(|p| p.ln()).collect();
        let mx = x.iter().cloned().fold(f32::MIN, f32::max);
        let blocks = vec![x.iter().map(|&v| ((v - mx) as f64).exp()).sum::<f64>()];
        let n = 20000;
        let mut out = vec![0u32; n];
        let mut order = DrawScratch::default();
        draw_tokens(
            Row::from_f32(&x),
            mx,
            &blocks,
            42,
            0,
            0,
            &mut order,
            &mut out,
        );
        for (t, p) in [(0u32, 0.5f64), (1, 0.3), (2, 0.2)] {
            let f = out.iter().filter(|&&o| o == t).count() as f64 / n as f64;
            let se = (p * (1.0 - p) / n as f64).sqrt();
            assert!((f - p).abs() < 5.0 * se, "token {t}: {f} vs {p}");
        }
    }
}
