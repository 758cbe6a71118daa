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

use crate::kernel::NORM_BLOCK;
use serde::{Deserialize, Serialize};

/// The three per-draw values for a given log r.
#[inline]
pub fn k_values(log_r: f64) -> [f64; 3] {
    [-log_r, 0.5 * log_r * log_r, log_r.exp_m1() - log_r]
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
/// `kernel::normalise`. `order` is scratch of the same length as `out`.
pub fn draw_tokens(
    x: &[f32],
    max: f32,
    blocks: &[f64],
    seed: u64,
    row: u64,
    direction: u64,
    order: &mut Vec<(f64, usize)>,
    out: &mut [u32],
) {
    let total: f64 = blocks.iter().sum();
    order.clear();
    order.extend((0..out.len()).map(|j| (uniform(seed, row, direction, j as u64) * total, j)));
    order.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
    // One walk over the blocks serves all draws, in increasing order of u.
    let mut acc = 0f64;
    let mut bi = 0usize;
    for &(u, j) in order.iter() {
        while bi + 1 < blocks.len() && acc + blocks[bi] <= u {
            acc += blocks[bi];
            bi += 1;
        }
        let lo = bi * NORM_BLOCK;
        let hi = (lo + NORM_BLOCK).min(x.len());
        let mut a = acc;
        let mut pick = None;
        let mut last_nonzero = lo;
        for (i, &v) in x[lo..hi].iter().enumerate() {
            let e = (v as f64 - max as f64).exp();
            if e > 0.0 {
                last_nonzero = lo + i;
                a += e;
                if a > u {
                    pick = Some(lo + i);
                    break;
                }
            }
        }
        // Rounding between the f32 block sums and this f64 walk can leave u just
        // past the block's end: the last token with mass is the right answer.
        out[j] = pick.unwrap_or(last_nonzero) as u32;
    }
}

/// Sums over positions for one (samples-per-position, direction) block.
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
        self.n += 1.0;
        self.exact += exact;
        for k in 0..3 {
            self.sum[k] += est[k];
            self.sum_sq[k] += est[k] * est[k];
            self.sum_err_sq[k] += (est[k] - exact) * (est[k] - exact);
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

    pub fn summary(&self, k: usize, scale: f64) -> KSummary {
        let n = self.n;
        let mean = self.sum[k] / n;
        let exact = self.exact / n;
        let var = (self.sum_sq[k] / n - mean * mean).max(0.0) * n / (n - 1.0).max(1.0);
        let std = var.sqrt();
        let rel = 0.1 * exact.abs();
        let need = if rel > 0.0 { (crate::stats::Z95 * std / rel).powi(2).ceil() } else { f64::INFINITY };
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
    /// Standard deviation across positions of the per-position estimate.
    pub std: f64,
    /// Root mean square of (estimate - exact) per position.
    pub rmse: f64,
    /// Positions needed for a 95% interval of +-10% of the exact mean.
    pub positions_for_10pct: f64,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn k3_is_never_negative() {
        for i in -2000..2000 {
            let lr = i as f64 * 0.01;
            assert!(k_values(lr)[2] >= 0.0, "log r = {lr}");
        }
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
        let mut order = Vec::new();
        draw_tokens(&x, mx, &blocks, 42, 0, 0, &mut order, &mut out);
        for (t, p) in [(0u32, 0.5f64), (1, 0.3), (2, 0.2)] {
            let f = out.iter().filter(|&&o| o == t).count() as f64 / n as f64;
            let se = (p * (1.0 - p) / n as f64).sqrt();
            assert!((f - p).abs() < 5.0 * se, "token {t}: {f} vs {p}");
        }
    }
}
