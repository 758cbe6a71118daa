//! Streaming statistics: per-prompt sums, cluster-robust intervals and exact
//! percentiles.
//!
//! Positions inside one prompt are correlated (a model that is lost at token
//! 40 is usually still lost at token 41), so treating them as independent
//! makes intervals far too narrow. The 95% interval of a mean is therefore the
//! cluster-robust ("sandwich") variance of a ratio estimator with prompts as
//! clusters: mean = sum S_g / sum n_g, Var = G/(G-1) * sum (S_g - mean n_g)^2
//! / (sum n_g)^2 (common practice in survey statistics). It needs only the
//! per-prompt sums, so sharded runs merge it exactly, and unlike a bootstrap
//! it costs nothing and involves no random numbers.

use serde::{Deserialize, Serialize};

/// z for a two-sided 95% normal interval (common practice).
pub const Z95: f64 = 1.959_963_984_540_054;

/// Mean with its cluster-robust 95% interval, from (n_g, S_g) pairs.
pub fn cluster_mean(groups: impl Iterator<Item = (f64, f64)> + Clone) -> (f64, Option<[f64; 2]>) {
    let (mut n, mut s, mut g) = (0f64, 0f64, 0usize);
    for (ng, sg) in groups.clone() {
        if ng > 0.0 {
            n += ng;
            s += sg;
            g += 1;
        }
    }
    if n == 0.0 {
        return (f64::NAN, None);
    }
    let mean = s / n;
    if g < 2 || !mean.is_finite() {
        return (mean, None);
    }
    let mut ss = 0f64;
    for (ng, sg) in groups {
        if ng > 0.0 {
            let r = sg - mean * ng;
            ss += r * r;
        }
    }
    let var = (g as f64 / (g as f64 - 1.0)) * ss / (n * n);
    let h = Z95 * var.sqrt();
    (mean, Some([mean - h, mean + h]))
}

/// Percentile by linear interpolation between closest ranks (the same
/// definition as numpy.percentile's default, common practice). `sorted`
/// must be sorted with f64::total_cmp.
pub fn percentile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let h = (sorted.len() - 1) as f64 * q;
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    let (a, b) = (sorted[lo], sorted[hi]);
    if lo == hi || a == b {
        a
    } else {
        a + (h - lo as f64) * (b - a)
    }
}

/// The aggregate object SPEC defines for every metric.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Aggregate {
    pub n: u64,
    pub mean: f64,
    pub ci95: Option<[f64; 2]>,
    pub p50: f64,
    pub p90: f64,
    pub p99: f64,
    pub p999: f64,
    pub max: f64,
}

impl Aggregate {
    /// From the exact values (sorted in place) and the per-prompt sums.
    pub fn exact(
        values: &mut [f64],
        groups: impl Iterator<Item = (f64, f64)> + Clone,
    ) -> Aggregate {
        values.sort_unstable_by(|a, b| a.total_cmp(b));
        let (mean, ci95) = cluster_mean(groups);
        Aggregate {
            n: values.len() as u64,
            mean,
            ci95,
            p50: percentile(values, 0.5),
            p90: percentile(values, 0.9),
            p99: percentile(values, 0.99),
            p999: percentile(values, 0.999),
            max: values.last().copied().unwrap_or(f64::NAN),
        }
    }

    /// Multiplies every value by `f` (unit conversion).
    pub fn scaled(&self, f: f64) -> Aggregate {
        Aggregate {
            n: self.n,
            mean: self.mean * f,
            ci95: self.ci95.map(|[a, b]| [a * f, b * f]),
            p50: self.p50 * f,
            p90: self.p90 * f,
            p99: self.p99 * f,
            p999: self.p999 * f,
            max: self.max * f,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentile_matches_numpy_linear() {
        // numpy.percentile([1, 2, 3, 4], [50, 90]) = [2.5, 3.7] (computed by hand
        // from numpy's documented linear rule, common practice).
        let v = [1.0, 2.0, 3.0, 4.0];
        assert!((percentile(&v, 0.5) - 2.5).abs() < 1e-12);
        assert!((percentile(&v, 0.9) - 3.7).abs() < 1e-12);
        assert_eq!(percentile(&v, 1.0), 4.0);
    }

    #[test]
    fn cluster_interval_reduces_to_the_usual_one_for_singletons() {
        // With one position per cluster, Var = n/(n-1) * sum (x - m)^2 / n^2 = s^2 / n,
        // the textbook standard error of the mean (common practice).
        let xs = [1.0, 2.0, 4.0, 7.0];
        let (m, ci) = cluster_mean(xs.iter().map(|&x| (1.0, x)));
        let s2 = xs.iter().map(|x| (x - m).powi(2)).sum::<f64>() / 3.0;
        let h = Z95 * (s2 / 4.0).sqrt();
        let ci = ci.unwrap();
        assert!((m - 3.5).abs() < 1e-12);
        assert!((ci[1] - m - h).abs() < 1e-12);
    }
}
