//! Binned summaries that the engine keeps per candidate for the plots: a
//! log-spaced histogram of per-position kl, and kl binned by the position's
//! index within its prompt.
//!
//! Both are fixed-layout count and sum arrays: they cost a few kilobytes per
//! candidate whatever the number of positions, they are filled in row order
//! (so the result never depends on the thread count), and two of them merge
//! by adding element by element (sharded runs). The layouts depend on nothing
//! but constants, never on the data, so partial results always line up.

use serde::{Deserialize, Serialize};

/// Finite bins of the fine kl histogram start at 10^KL_LO_EXP nats ...
pub const KL_LO_EXP: i32 = -12;
/// ... and end at 10^KL_HI_EXP nats.
pub const KL_HI_EXP: i32 = 3;
/// Bins per factor of ten.
pub const KL_PER_DECADE: usize = 10;
/// Finite bins of the fine histogram.
pub const KL_BINS: usize = (KL_HI_EXP - KL_LO_EXP) as usize * KL_PER_DECADE;

/// The histogram kept per position bin: 10^-10 .. 10^2, 10 per decade.
pub const COARSE_LO_EXP: i32 = -10;
pub const COARSE_HI_EXP: i32 = 2;
pub const COARSE_PER_DECADE: usize = 10;
pub const COARSE_BINS: usize = (COARSE_HI_EXP - COARSE_LO_EXP) as usize * COARSE_PER_DECADE;

/// Slot of `kl` in a log histogram with `bins` finite bins: 0 holds values
/// below the first edge (zero included), 1..=bins the finite bins, bins + 1
/// values at or above the last edge (infinity included).
#[inline]
fn log_slot(kl: f64, lo_exp: i32, per_decade: usize, bins: usize) -> usize {
    if kl.is_nan() {
        return 0;
    }
    if kl == f64::INFINITY {
        return bins + 1;
    }
    if kl <= 0.0 {
        return 0;
    }
    let x = (kl.log10() - lo_exp as f64) * per_decade as f64;
    if x < 0.0 {
        0
    } else if x >= bins as f64 {
        bins + 1
    } else {
        1 + x.floor() as usize
    }
}

/// Lower and upper edge (nats) of slot `s` (1..=bins) of a log histogram.
fn log_edges(s: usize, lo_exp: i32, per_decade: usize) -> (f64, f64) {
    let e = |i: usize| 10f64.powf(lo_exp as f64 + i as f64 / per_decade as f64);
    (e(s - 1), e(s))
}

/// Fine log-spaced histogram of per-position kl.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct KlHistogram {
    /// `KL_BINS + 2` slots once anything was added (see `log_slot`); empty before.
    pub counts: Vec<u64>,
}

impl KlHistogram {
    pub fn add(&mut self, kl: f64) {
        if self.counts.is_empty() {
            self.counts = vec![0; KL_BINS + 2];
        }
        self.counts[log_slot(kl, KL_LO_EXP, KL_PER_DECADE, KL_BINS)] += 1;
    }

    pub fn merge(&mut self, o: &KlHistogram) {
        if self.counts.len() < o.counts.len() {
            self.counts.resize(o.counts.len(), 0);
        }
        for (a, b) in self.counts.iter_mut().zip(&o.counts) {
            *a += b;
        }
    }

    pub fn total(&self) -> u64 {
        self.counts.iter().sum()
    }

    /// Count below 10^KL_LO_EXP (zero included).
    pub fn below(&self) -> u64 {
        self.counts.first().copied().unwrap_or(0)
    }

    /// Count at or above 10^KL_HI_EXP (infinity included).
    pub fn above(&self) -> u64 {
        if self.counts.len() == KL_BINS + 2 {
            self.counts[KL_BINS + 1]
        } else {
            0
        }
    }

    /// (lower edge, upper edge, count) of every finite bin, in nats.
    pub fn bins(&self) -> impl Iterator<Item = (f64, f64, u64)> + '_ {
        let n = if self.counts.len() == KL_BINS + 2 {
            KL_BINS
        } else {
            0
        };
        (1..=n).map(move |s| {
            let (lo, hi) = log_edges(s, KL_LO_EXP, KL_PER_DECADE);
            (lo, hi, self.counts[s])
        })
    }
}

/// Position bins: indices 0..16 each have their own bin; beyond, every
/// doubling of the index is split into 8 bins (16-17, 18-19, ..., 32-35, ...).
pub const EXACT_POSITIONS: u64 = 16;
pub const BINS_PER_OCTAVE: u64 = 8;

/// The bin of a position index.
pub fn position_bin(pos: u64) -> usize {
    if pos < EXACT_POSITIONS {
        return pos as usize;
    }
    let k = 63 - pos.leading_zeros() as u64; // floor(log2 pos) >= 4
    let sub = (pos >> (k - 3)) - BINS_PER_OCTAVE; // 0..8
    (EXACT_POSITIONS + (k - 4) * BINS_PER_OCTAVE + sub) as usize
}

/// First and last position index (inclusive) of a bin.
pub fn position_range(bin: usize) -> (u64, u64) {
    let b = bin as u64;
    if b < EXACT_POSITIONS {
        return (b, b);
    }
    let k = 4 + (b - EXACT_POSITIONS) / BINS_PER_OCTAVE;
    let sub = (b - EXACT_POSITIONS) % BINS_PER_OCTAVE;
    let width = 1u64 << (k - 3);
    let lo = (BINS_PER_OCTAVE + sub) * width;
    (lo, lo + width - 1)
}

/// Sums of one position bin.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct PositionBin {
    pub n: u64,
    /// Positions with infinite kl (left out of the sums).
    pub infinite: u64,
    pub kl_sum: f64,
    pub kl_sum_sq: f64,
    pub top1_sum: f64,
    /// Coarse log histogram of kl (`COARSE_BINS + 2` slots), for quantiles.
    pub hist: Vec<u32>,
}

impl PositionBin {
    /// Mean kl over the finite positions of the bin.
    pub fn kl_mean(&self) -> f64 {
        let m = self.n - self.infinite;
        if m == 0 {
            f64::NAN
        } else {
            self.kl_sum / m as f64
        }
    }

    /// Approximate quantile from the coarse histogram, interpolated
    /// geometrically within the bin that holds it.
    pub fn kl_quantile(&self, q: f64) -> f64 {
        hist_quantile(&self.hist, q, COARSE_LO_EXP, COARSE_PER_DECADE, COARSE_BINS)
    }
}

/// Quantile of a log histogram (slot layout of `log_slot`): the slot holding
/// rank q*(n-1), interpolated in log space within it. Below the first edge it
/// returns 0, at or above the last edge +inf.
pub fn hist_quantile<T: Copy + Into<u64>>(
    counts: &[T],
    q: f64,
    lo_exp: i32,
    per_decade: usize,
    bins: usize,
) -> f64 {
    let n: u64 = counts.iter().map(|&c| c.into()).sum();
    if n == 0 || counts.len() != bins + 2 {
        return f64::NAN;
    }
    let rank = q.clamp(0.0, 1.0) * (n - 1) as f64;
    let mut before = 0u64;
    for (s, &c) in counts.iter().enumerate() {
        let c: u64 = c.into();
        if c > 0 && (before + c) as f64 > rank {
            if s == 0 {
                return 0.0;
            }
            if s == bins + 1 {
                return f64::INFINITY;
            }
            let (lo, hi) = log_edges(s, lo_exp, per_decade);
            let f = ((rank - before as f64 + 0.5) / c as f64).clamp(0.0, 1.0);
            return lo * (hi / lo).powf(f);
        }
        before += c;
    }
    f64::NAN
}

/// kl and top-1 agreement binned by position index within the prompt.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct PositionProfile {
    /// Indexed by `position_bin`, grown as longer prompts appear.
    pub bins: Vec<PositionBin>,
}

impl PositionProfile {
    pub fn add(&mut self, position: u64, kl: f64, top1: f64) {
        let b = position_bin(position);
        if self.bins.len() <= b {
            self.bins.resize(b + 1, PositionBin::default());
        }
        let bin = &mut self.bins[b];
        if bin.hist.is_empty() {
            bin.hist = vec![0; COARSE_BINS + 2];
        }
        bin.n += 1;
        if kl.is_finite() {
            bin.kl_sum += kl;
            bin.kl_sum_sq += kl * kl;
        } else {
            bin.infinite += 1;
        }
        bin.top1_sum += top1;
        bin.hist[log_slot(kl, COARSE_LO_EXP, COARSE_PER_DECADE, COARSE_BINS)] += 1;
    }

    pub fn merge(&mut self, o: &PositionProfile) {
        if self.bins.len() < o.bins.len() {
            self.bins.resize(o.bins.len(), PositionBin::default());
        }
        for (a, b) in self.bins.iter_mut().zip(&o.bins) {
            if b.n == 0 {
                continue;
            }
            if a.hist.len() < b.hist.len() {
                a.hist.resize(b.hist.len(), 0);
            }
            a.n += b.n;
            a.infinite += b.infinite;
            a.kl_sum += b.kl_sum;
            a.kl_sum_sq += b.kl_sum_sq;
            a.top1_sum += b.top1_sum;
            for (x, y) in a.hist.iter_mut().zip(&b.hist) {
                *x += y;
            }
        }
    }
}

/// What the cluster-robust variance of "the share of positions with kl at
/// or above an edge of the fine histogram" needs, for every edge at once:
/// with c_g the count of such positions in prompt g and n_g its positions,
/// the sums over prompts of c_g^2 and of c_g * n_g (the sum of c_g is the
/// histogram's, the sum of n_g^2 comes from the per-prompt sums). Prompts
/// are folded when they end; integers, so shards merge exactly.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct TailSums {
    /// Per slot s of the fine histogram (`KL_BINS + 2` entries, or empty):
    /// sums over prompts of c_gs^2 and of c_gs * n_g, where c_gs counts the
    /// prompt's positions in slots s and above.
    pub sq: Vec<u64>,
    pub cross: Vec<u64>,
    /// The prompt being filled: its index and per-slot counts.
    #[serde(skip)]
    current: Option<(u64, Vec<u64>)>,
}

impl TailSums {
    pub fn add(&mut self, prompt: u64, kl: f64) {
        if self.current.as_ref().is_some_and(|c| c.0 != prompt) {
            self.finish();
        }
        let cur = self
            .current
            .get_or_insert_with(|| (prompt, vec![0; KL_BINS + 2]));
        cur.1[log_slot(kl, KL_LO_EXP, KL_PER_DECADE, KL_BINS)] += 1;
    }

    /// Folds the prompt being filled (call once the last position was added).
    pub fn finish(&mut self) {
        let Some((_, h)) = self.current.take() else {
            return;
        };
        if self.sq.is_empty() {
            self.sq = vec![0; KL_BINS + 2];
            self.cross = vec![0; KL_BINS + 2];
        }
        let n: u64 = h.iter().sum();
        let mut c = 0u64;
        for s in (0..h.len()).rev() {
            c += h[s];
            self.sq[s] += c * c;
            self.cross[s] += c * n;
        }
    }

    pub fn merge(&mut self, o: &TailSums) {
        for (a, b) in [(&mut self.sq, &o.sq), (&mut self.cross, &o.cross)] {
            if a.len() < b.len() {
                a.resize(b.len(), 0);
            }
            for (x, y) in a.iter_mut().zip(b) {
                *x += y;
            }
        }
    }
}

/// A 95% interval for the q-quantile `v` of kl by Woodruff's method
/// (Woodruff 1952, JASA 47, "Confidence intervals for medians and other
/// position measures"; cited from memory, common practice in survey
/// statistics): the cluster-robust standard error h/z of the share of
/// positions at or below the quantile, then the quantile function read at
/// q - h and q + h. The share is taken at the fine histogram's edge nearest
/// `v` (within a factor 10^0.05), where `TailSums` holds what its variance
/// needs. `n_sq` is the sum over prompts of n_g^2, `groups` the number of
/// prompts with positions; `quantile` reads the quantile function.
pub fn quantile_interval(
    hist: &KlHistogram,
    tail: &TailSums,
    n_sq: f64,
    groups: usize,
    q: f64,
    v: f64,
    quantile: impl Fn(f64) -> f64,
) -> Option<[f64; 2]> {
    if !(v > 0.0 && v.is_finite())
        || groups < 2
        || tail.sq.len() != KL_BINS + 2
        || hist.counts.len() != KL_BINS + 2
    {
        return None;
    }
    let x = (v.log10() - KL_LO_EXP as f64) * KL_PER_DECADE as f64;
    let s = (x.round() as i64 + 1).clamp(1, KL_BINS as i64 + 1) as usize;
    let n: u64 = hist.total();
    let above: u64 = hist.counts[s..].iter().sum();
    if n == 0 {
        return None;
    }
    let (nf, f) = (n as f64, above as f64 / n as f64);
    let ss = (tail.sq[s] as f64 - 2.0 * f * tail.cross[s] as f64 + f * f * n_sq).max(0.0);
    let g = groups as f64;
    let h = crate::stats::Z95 * (g / (g - 1.0) * ss).sqrt() / nf;
    let (a, b) = (
        quantile((q - h).clamp(0.0, 1.0)),
        quantile((q + h).clamp(0.0, 1.0)),
    );
    Some([a.min(v), b.max(v)])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn position_bins_tile_the_indices() {
        // Every index lands in the bin whose range holds it, and consecutive
        // bins leave no gap (checked by walking the integers).
        let mut next = 0u64;
        for b in 0..120 {
            let (lo, hi) = position_range(b);
            assert_eq!(lo, next, "bin {b}");
            assert!(hi >= lo);
            for p in [lo, hi, (lo + hi) / 2] {
                assert_eq!(position_bin(p), b, "position {p}");
            }
            next = hi + 1;
        }
    }

    #[test]
    fn histogram_slots_follow_decades() {
        let mut h = KlHistogram::default();
        for kl in [0.0, 1e-13, 1e-12, 0.5, 1e3, f64::INFINITY] {
            h.add(kl);
        }
        assert_eq!(h.below(), 2);
        assert_eq!(h.above(), 2);
        // 1e-12 is the lower edge of the first finite bin; 0.5 lies in
        // [10^-0.4, 10^-0.3) = [0.398, 0.501).
        let hit: Vec<(f64, f64)> = h.bins().filter(|b| b.2 > 0).map(|b| (b.0, b.1)).collect();
        assert_eq!(hit.len(), 2);
        assert!((hit[0].0 - 1e-12).abs() < 1e-24);
        assert!(hit[1].0 <= 0.5 && 0.5 < hit[1].1);
    }

    #[test]
    fn quantile_of_a_log_histogram_is_close() {
        // Values spread evenly in log10 over [-6, -2): the median is 1e-4
        // (exact by symmetry); one coarse bin is a factor 10^0.1 wide.
        let mut b = PositionProfile::default();
        for i in 0..4000 {
            let kl = 10f64.powf(-6.0 + 4.0 * (i as f64 + 0.5) / 4000.0);
            b.add(3, kl, 1.0);
        }
        let m = b.bins[3].kl_quantile(0.5);
        assert!((m.log10() + 4.0).abs() < 0.1, "{m}");
    }

    #[test]
    fn tail_sums_match_a_direct_count() {
        // Three prompts; for every edge, sum over prompts of c^2 and c*n
        // computed directly from the values.
        let prompts: Vec<Vec<f64>> = vec![
            vec![1e-5, 2e-3, 0.5, 0.0],
            vec![3e-4; 7],
            vec![f64::INFINITY, 1e-9],
        ];
        let mut t = TailSums::default();
        for (g, vals) in prompts.iter().enumerate() {
            for &v in vals {
                t.add(g as u64, v);
            }
        }
        t.finish();
        for s in 0..KL_BINS + 2 {
            let (mut sq, mut cross) = (0u64, 0u64);
            for vals in &prompts {
                let c = vals
                    .iter()
                    .filter(|&&v| log_slot(v, KL_LO_EXP, KL_PER_DECADE, KL_BINS) >= s)
                    .count() as u64;
                sq += c * c;
                cross += c * vals.len() as u64;
            }
            assert_eq!((t.sq[s], t.cross[s]), (sq, cross), "slot {s}");
        }
    }

    #[test]
    fn woodruff_interval_for_independent_values_is_the_binomial_one() {
        // One position per prompt (independent values): the share at or below
        // the q-quantile has standard error sqrt(q(1-q)/n) (binomial, common
        // practice), so the interval is [Q(q - z se), Q(q + z se)]. Values
        // 10^(-6 + 4u) for u evenly spaced: Q(p) = 10^(-6 + 4p).
        let n = 20000usize;
        let (mut h, mut t) = (KlHistogram::default(), TailSums::default());
        let vals: Vec<f64> = (0..n)
            .map(|i| 10f64.powf(-6.0 + 4.0 * (i as f64 + 0.5) / n as f64))
            .collect();
        for (g, &v) in vals.iter().enumerate() {
            h.add(v);
            t.add(g as u64, v);
        }
        t.finish();
        let q = 0.9;
        let quant = |p: f64| 10f64.powf(-6.0 + 4.0 * p);
        let ci = quantile_interval(&h, &t, n as f64, n, q, quant(q), quant).unwrap();
        let se = (q * (1.0 - q) / n as f64).sqrt();
        let want = [
            quant(q - crate::stats::Z95 * se),
            quant(q + crate::stats::Z95 * se),
        ];
        for k in 0..2 {
            // The share is read at the nearest edge, not at the quantile itself.
            assert!(
                (ci[k].log10() - want[k].log10()).abs() < 2e-3,
                "{ci:?} vs {want:?}"
            );
        }
    }

    #[test]
    fn merging_equals_one_pass() {
        let vals: Vec<(u64, f64)> = (0..500)
            .map(|i| (i % 97, 1e-5 * (1 + i % 13) as f64))
            .collect();
        let mut one = (KlHistogram::default(), PositionProfile::default());
        let mut a = (KlHistogram::default(), PositionProfile::default());
        let mut b = (KlHistogram::default(), PositionProfile::default());
        for (i, &(p, kl)) in vals.iter().enumerate() {
            one.0.add(kl);
            one.1.add(p, kl, 1.0);
            let t = if i < 200 { &mut a } else { &mut b };
            t.0.add(kl);
            t.1.add(p, kl, 1.0);
        }
        a.0.merge(&b.0);
        a.1.merge(&b.1);
        assert_eq!(a.0, one.0);
        for (x, y) in a.1.bins.iter().zip(&one.1.bins) {
            assert_eq!(x.n, y.n);
            assert_eq!(x.hist, y.hist);
            assert!((x.kl_sum - y.kl_sum).abs() < 1e-15);
        }
    }
}
