//! A mergeable quantile sketch with a bounded relative error, for percentiles
//! of sharded runs.
//!
//! Log-bucketed histogram in the manner of DDSketch (Masson, Rim and Lee,
//! "DDSketch: a fast and fully-mergeable quantile sketch with relative-error
//! guarantees", VLDB 2019): with gamma = (1 + a) / (1 - a), a positive value x
//! goes to bucket i = ceil(log_gamma x), which holds (gamma^(i-1), gamma^i];
//! every value of the bucket lies within a relative distance a of the
//! bucket's representative 2 gamma^i / (gamma + 1). The counts are exact, so
//! the bucket that holds the k-th smallest value is found exactly, and the
//! value returned for rank k is within a (relative) of the true k-th value.
//! Two sketches with the same a merge by adding counts, in any order, with no
//! loss.
//!
//! Unlike the paper's bounded-memory variant, no bucket is ever collapsed:
//! every positive finite f64 has an index, from the smallest subnormal
//! (about 4.9e-324) to f64::MAX, about 1454 / ln(gamma) buckets in all (about
//! 145,000 at a = 0.005), and a store only spans the indices it has seen.
//! Zero, +inf and -inf are counted on their own; negative values use a mirrored
//! store. The exact minimum and maximum are kept, so rank 0 and rank n - 1
//! are exact and no representative falls outside [min, max].
//!
//! Percentiles interpolate linearly between the values at the two closest
//! ranks, the definition `stats::percentile` uses for exact values (numpy's
//! default). With both rank values within a of the truth and of one sign, the
//! interpolated value is too. Below the normal range (|x| < 2.2e-308) the f64
//! format itself cannot hold a relative step of a, and the bound there is a
//! relative or one subnormal step, whichever is larger.

/// The relative accuracy the partial results use: half of the 1% that
/// reports promise, leaving room for rounding in the logarithm.
pub const DEFAULT_RELATIVE_ACCURACY: f64 = 0.005;

/// Counts of consecutive bucket indices starting at `offset`.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Store {
    pub offset: i32,
    pub counts: Vec<u64>,
}

impl Store {
    fn add(&mut self, index: i32, n: u64) {
        if self.counts.is_empty() {
            self.offset = index;
            self.counts.push(0);
        } else if index < self.offset {
            // Grow downwards by at least the current length, so values that
            // arrive in decreasing order cost amortised O(1) each; `trim`
            // drops the unused slack.
            let grow = ((self.offset - index) as usize).max(self.counts.len());
            self.counts.splice(0..0, std::iter::repeat_n(0, grow));
            self.offset -= grow as i32;
        } else if index >= self.offset + self.counts.len() as i32 {
            let len = (index - self.offset) as usize + 1;
            self.counts.resize(len, 0);
        }
        self.counts[(index - self.offset) as usize] += n;
    }

    fn merge(&mut self, o: &Store) {
        for (k, &c) in o.counts.iter().enumerate() {
            if c > 0 {
                self.add(o.offset + k as i32, c);
            }
        }
    }

    fn total(&self) -> u64 {
        self.counts.iter().sum()
    }

    /// Drops zero counts at both ends (a canonical form for comparison and files).
    fn trim(&mut self) {
        let first = self.counts.iter().position(|&c| c > 0);
        match first {
            None => {
                self.counts.clear();
                self.offset = 0;
            }
            Some(f) => {
                let last = self.counts.iter().rposition(|&c| c > 0).unwrap();
                self.counts.truncate(last + 1);
                self.counts.drain(..f);
                self.offset += f as i32;
            }
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct Sketch {
    alpha: f64,
    ln_gamma: f64,
    positive: Store,
    negative: Store,
    zero: u64,
    pos_inf: u64,
    neg_inf: u64,
    count: u64,
    min: f64,
    max: f64,
}

/// The stored parts of a sketch, for a file format to write and read back.
#[derive(Debug, Clone, PartialEq)]
pub struct SketchParts {
    pub relative_accuracy: f64,
    pub count: u64,
    pub zero: u64,
    pub pos_inf: u64,
    pub neg_inf: u64,
    pub min: f64,
    pub max: f64,
    pub positive: Store,
    pub negative: Store,
}

impl Default for Sketch {
    fn default() -> Self {
        Sketch::new(DEFAULT_RELATIVE_ACCURACY)
    }
}

impl Sketch {
    /// A sketch whose values are within `relative_accuracy` (0 < a < 1) of the truth.
    pub fn new(relative_accuracy: f64) -> Sketch {
        assert!(
            relative_accuracy > 0.0 && relative_accuracy < 1.0,
            "relative accuracy must lie in (0, 1)"
        );
        let gamma = (1.0 + relative_accuracy) / (1.0 - relative_accuracy);
        Sketch {
            alpha: relative_accuracy,
            ln_gamma: gamma.ln(),
            positive: Store::default(),
            negative: Store::default(),
            zero: 0,
            pos_inf: 0,
            neg_inf: 0,
            count: 0,
            min: f64::NAN,
            max: f64::NAN,
        }
    }

    pub fn relative_accuracy(&self) -> f64 {
        self.alpha
    }

    pub fn count(&self) -> u64 {
        self.count
    }

    pub fn min(&self) -> f64 {
        self.min
    }

    pub fn max(&self) -> f64 {
        self.max
    }

    #[inline]
    fn index(&self, magnitude: f64) -> i32 {
        (magnitude.ln() / self.ln_gamma).ceil() as i32
    }

    /// The bucket's representative, 2 gamma^i / (gamma + 1), computed in the
    /// log domain so the top bucket does not overflow before the clamp.
    fn representative(&self, index: i32) -> f64 {
        let gamma = self.ln_gamma.exp();
        (index as f64 * self.ln_gamma + (2.0 / (1.0 + gamma)).ln()).exp()
    }

    /// Adds one value. NaN is not a value and is ignored (callers count it).
    pub fn add(&mut self, x: f64) {
        if x.is_nan() {
            return;
        }
        if x == f64::INFINITY {
            self.pos_inf += 1;
        } else if x == f64::NEG_INFINITY {
            self.neg_inf += 1;
        } else if x > 0.0 {
            let i = self.index(x);
            self.positive.add(i, 1);
        } else if x < 0.0 {
            let i = self.index(-x);
            self.negative.add(i, 1);
        } else {
            self.zero += 1;
        }
        if self.count == 0 {
            self.min = x;
            self.max = x;
        } else {
            self.min = self.min.min(x);
            self.max = self.max.max(x);
        }
        self.count += 1;
    }

    /// Adds every count of `o`. Both must have the same relative accuracy.
    pub fn merge(&mut self, o: &Sketch) -> Result<(), String> {
        if o.alpha != self.alpha {
            return Err(format!(
                "sketch relative accuracy {} differs from {}",
                o.alpha, self.alpha
            ));
        }
        if o.count == 0 {
            return Ok(());
        }
        self.positive.merge(&o.positive);
        self.negative.merge(&o.negative);
        self.zero += o.zero;
        self.pos_inf += o.pos_inf;
        self.neg_inf += o.neg_inf;
        if self.count == 0 {
            self.min = o.min;
            self.max = o.max;
        } else {
            self.min = self.min.min(o.min);
            self.max = self.max.max(o.max);
        }
        self.count += o.count;
        Ok(())
    }

    /// The value at rank `k` (0-based, in increasing order), within the
    /// relative accuracy of the true k-th smallest value.
    pub fn value_at_rank(&self, k: u64) -> f64 {
        if self.count == 0 || k >= self.count {
            return f64::NAN;
        }
        if k == 0 {
            return self.min;
        }
        if k == self.count - 1 {
            return self.max;
        }
        let clamp = |v: f64| v.max(self.min).min(self.max);
        let mut seen = self.neg_inf;
        if k < seen {
            return f64::NEG_INFINITY;
        }
        // Negative values: largest magnitude (highest index) first.
        for (j, &c) in self.negative.counts.iter().enumerate().rev() {
            seen += c;
            if k < seen {
                return clamp(-self.representative(self.negative.offset + j as i32));
            }
        }
        seen += self.zero;
        if k < seen {
            return 0.0;
        }
        for (j, &c) in self.positive.counts.iter().enumerate() {
            seen += c;
            if k < seen {
                return clamp(self.representative(self.positive.offset + j as i32));
            }
        }
        f64::INFINITY
    }

    /// Quantile q in [0, 1] by linear interpolation between the closest
    /// ranks, as `stats::percentile` does on exact values.
    pub fn quantile(&self, q: f64) -> f64 {
        if self.count == 0 {
            return f64::NAN;
        }
        let h = (self.count - 1) as f64 * q.clamp(0.0, 1.0);
        let lo = h.floor() as u64;
        let hi = h.ceil() as u64;
        let a = self.value_at_rank(lo);
        let b = self.value_at_rank(hi);
        if lo == hi || a == b {
            a
        } else {
            a + (h - lo as f64) * (b - a)
        }
    }

    pub fn parts(&self) -> SketchParts {
        let (mut positive, mut negative) = (self.positive.clone(), self.negative.clone());
        positive.trim();
        negative.trim();
        SketchParts {
            relative_accuracy: self.alpha,
            count: self.count,
            zero: self.zero,
            pos_inf: self.pos_inf,
            neg_inf: self.neg_inf,
            min: self.min,
            max: self.max,
            positive,
            negative,
        }
    }

    /// Rebuilds a sketch from stored parts, checking that they agree.
    pub fn from_parts(p: SketchParts) -> Result<Sketch, String> {
        let a = p.relative_accuracy;
        if !(a > 0.0 && a < 1.0) {
            return Err(format!("sketch relative accuracy {a} is outside (0, 1)"));
        }
        // The widest store a valid sketch can have (all positive finite f64).
        let mut s = Sketch::new(a);
        let (lo, hi) = (s.index(f64::from_bits(1)) - 1, s.index(f64::MAX) + 1);
        for (name, st) in [("positive", &p.positive), ("negative", &p.negative)] {
            if !st.counts.is_empty()
                && (st.offset < lo || st.offset as i64 + st.counts.len() as i64 - 1 > hi as i64)
            {
                return Err(format!(
                    "sketch {name} buckets {}..{} lie outside the possible range {lo}..{hi}",
                    st.offset,
                    st.offset as i64 + st.counts.len() as i64
                ));
            }
        }
        let total = p.positive.total() + p.negative.total() + p.zero + p.pos_inf + p.neg_inf;
        if total != p.count {
            return Err(format!(
                "sketch counts add up to {total}, but its count is {}",
                p.count
            ));
        }
        // Also refuses a NaN minimum or maximum of a non-empty sketch.
        if p.count > 0 && p.min.partial_cmp(&p.max).is_none_or(|o| o.is_gt()) {
            return Err(format!(
                "sketch minimum {} is not at most its maximum {}",
                p.min, p.max
            ));
        }
        s.positive = p.positive;
        s.negative = p.negative;
        s.zero = p.zero;
        s.pos_inf = p.pos_inf;
        s.neg_inf = p.neg_inf;
        s.count = p.count;
        s.min = if p.count == 0 { f64::NAN } else { p.min };
        s.max = if p.count == 0 { f64::NAN } else { p.max };
        Ok(s)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::percentile;

    /// SplitMix64 stream (Steele, Lea and Flood 2014; common practice) as uniforms in (0, 1).
    fn uniforms(seed: u64, n: usize) -> Vec<f64> {
        (0..n as u64)
            .map(|i| {
                ((crate::estimators::mix64(seed ^ i.wrapping_mul(0x9E37)) >> 11) as f64 + 0.5)
                    / (1u64 << 53) as f64
            })
            .collect()
    }

    fn rel_err(est: f64, exact: f64) -> f64 {
        if est == exact {
            0.0
        } else {
            ((est - exact) / exact).abs()
        }
    }

    const QS: [f64; 9] = [0.0, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999, 0.9999, 1.0];

    /// The sketch against exact percentiles (`stats::percentile`, numpy's
    /// linear rule) on the same values; returns the worst relative error.
    fn check(values: &[f64], bound: f64) -> f64 {
        let mut s = Sketch::default();
        for &v in values {
            s.add(v);
        }
        let mut sorted = values.to_vec();
        sorted.sort_by(|a, b| a.total_cmp(b));
        let mut worst = 0f64;
        for q in QS {
            let (e, x) = (s.quantile(q), percentile(&sorted, q));
            let r = rel_err(e, x);
            assert!(r <= bound, "q {q}: sketch {e} exact {x} relative error {r}");
            worst = worst.max(r);
        }
        worst
    }

    #[test]
    fn log_normal_values_within_the_bound() {
        // Per-position kl spans many decades: log-normal, median 1e-3, sigma 3.
        let u = uniforms(1, 20002);
        let v: Vec<f64> = u
            .chunks_exact(2)
            .map(|c| {
                1e-3 * (3.0 * (-2.0 * c[0].ln()).sqrt() * (std::f64::consts::TAU * c[1]).cos())
                    .exp()
            })
            .collect();
        let w = check(&v, DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-9));
        assert!(
            w > 0.0,
            "a sketch that is exact on continuous data is suspicious"
        );
    }

    #[test]
    fn uniform_and_exponential_values_within_the_bound() {
        let u = uniforms(2, 5000);
        check(&u, DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-9));
        let e: Vec<f64> = u.iter().map(|x| -x.ln()).collect();
        check(&e, DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-9));
    }

    #[test]
    fn every_bucket_representative_is_within_the_bound() {
        // Values just inside both edges of many buckets: x = gamma^i and just above gamma^(i-1).
        let s = Sketch::default();
        let gamma = s.ln_gamma.exp();
        for i in (-70000..70000).step_by(997) {
            let hi = (i as f64 * s.ln_gamma).exp();
            for x in [hi, hi / gamma * (1.0 + 1e-12)] {
                if !(x.is_normal()) {
                    continue;
                }
                let r = rel_err(s.representative(s.index(x)), x);
                assert!(r <= DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-6), "x {x}: {r}");
            }
        }
    }

    #[test]
    fn zeros_tiny_values_and_infinities() {
        // Half zeros, tiny subnormal and normal values, one +inf: ranks land in the
        // right class and the tiny ones keep their relative accuracy.
        let mut v = vec![0.0; 50];
        v.extend((1..=40).map(|i| i as f64 * 1e-300));
        v.extend((1..=9).map(|i| i as f64 * 1e-310)); // subnormal
        v.push(f64::INFINITY);
        let mut s = Sketch::default();
        for &x in &v {
            s.add(x);
        }
        let mut sorted = v.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        assert_eq!(s.quantile(0.0), 0.0);
        assert_eq!(s.quantile(0.4), percentile(&sorted, 0.4)); // still among the zeros
        assert_eq!(s.quantile(1.0), f64::INFINITY);
        assert_eq!(s.value_at_rank(99), f64::INFINITY);
        // Normal tiny values: the usual bound.
        for k in 60..99 {
            let (e, x) = (s.value_at_rank(k), sorted[k as usize]);
            assert!(
                rel_err(e, x) <= DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-9),
                "rank {k}: {e} vs {x}"
            );
        }
        // Subnormal ones: the bound or one subnormal step.
        for k in 50..59 {
            let (e, x) = (s.value_at_rank(k), sorted[k as usize]);
            assert!(
                (e - x).abs()
                    <= (DEFAULT_RELATIVE_ACCURACY * x).max(f64::from_bits(1)) * (1.0 + 1e-9),
                "rank {k}: {e} vs {x}"
            );
        }
        // Interpolating towards +inf gives +inf, as the exact rule does.
        assert_eq!(s.quantile(0.999), percentile(&sorted, 0.999));
    }

    #[test]
    fn negative_values_mirror_positive_ones() {
        let u = uniforms(3, 3000);
        let v: Vec<f64> = u.iter().map(|x| x - 0.5).collect();
        let mut s = Sketch::default();
        for &x in &v {
            s.add(x);
        }
        let mut sorted = v.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        for k in [0u64, 1, 10, 500, 1499, 1500, 2500, 2999] {
            let (e, x) = (s.value_at_rank(k), sorted[k as usize]);
            assert!(
                rel_err(e, x) <= DEFAULT_RELATIVE_ACCURACY * (1.0 + 1e-9),
                "rank {k}: {e} vs {x}"
            );
        }
        s.add(f64::NEG_INFINITY);
        assert_eq!(s.value_at_rank(0), f64::NEG_INFINITY);
    }

    #[test]
    fn nan_is_ignored_and_extremes_are_exact() {
        let mut s = Sketch::default();
        for x in [3.0, f64::NAN, 1e-5, f64::MAX, 7.0] {
            s.add(x);
        }
        assert_eq!(s.count(), 4);
        assert_eq!(s.quantile(0.0), 1e-5);
        assert_eq!(s.quantile(1.0), f64::MAX);
        assert!(s.value_at_rank(2).is_finite());
        assert!(Sketch::default().quantile(0.5).is_nan());
    }

    #[test]
    fn merging_equals_one_sketch_of_everything() {
        let u = uniforms(4, 9000);
        let v: Vec<f64> = u.iter().map(|x| (x * 30.0 - 25.0).exp()).collect();
        let mut whole = Sketch::default();
        let mut parts = [Sketch::default(), Sketch::default(), Sketch::default()];
        for (i, &x) in v.iter().enumerate() {
            whole.add(x);
            parts[i * 3 / v.len()].add(x);
        }
        // Merge out of order: the result must not depend on it.
        let mut merged = Sketch::default();
        for i in [2, 0, 1] {
            merged.merge(&parts[i]).unwrap();
        }
        assert_eq!(merged.parts(), whole.parts());
        for q in QS {
            assert_eq!(merged.quantile(q), whole.quantile(q));
        }
        assert!(merged.merge(&Sketch::new(0.01)).is_err());
    }

    #[test]
    fn parts_round_trip_and_are_checked() {
        let mut s = Sketch::default();
        for x in [0.0, 1e-9, 2.5, -4.0, f64::INFINITY] {
            s.add(x);
        }
        let p = s.parts();
        let back = Sketch::from_parts(p.clone()).unwrap();
        for k in 0..5 {
            assert_eq!(back.value_at_rank(k), s.value_at_rank(k));
        }
        let mut bad = p.clone();
        bad.count += 1;
        assert!(Sketch::from_parts(bad).is_err());
        let mut bad = p;
        bad.positive.offset = i32::MAX - 1;
        assert!(Sketch::from_parts(bad).is_err());
    }
}
