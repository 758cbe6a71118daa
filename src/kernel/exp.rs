//! A branch-free single-precision exp for the hot loops.
//!
//! `f32::exp` calls libm one value at a time and blocks vectorisation. This
//! version is straight-line arithmetic (range reduction by ln 2 in two parts,
//! a degree-6 polynomial, exponent assembled from bits) that LLVM turns into
//! SIMD on every target. Relative error is about 2 ulp on the range that
//! matters; arguments below -87.3 (including -inf) give exactly 0, which the
//! kernel relies on for -inf logits. NaN propagates.

const LOG2E: f32 = std::f32::consts::LOG2_E;
// ln 2 split so that n * LN2_HI is exact for |n| < 2^9 (Cody and Waite's method, common practice).
const LN2_HI: f32 = 0.693_359_375;
const LN2_LO: f32 = -2.121_944_4e-4;
// Minimax-style coefficients for exp on [-ln2/2, ln2/2] (the classic single-precision set).
const P0: f32 = 1.987_569_1e-4;
const P1: f32 = 1.398_199_9e-3;
const P2: f32 = 8.333_452e-3;
const P3: f32 = 4.166_579_6e-2;
const P4: f32 = 1.666_666_5e-1;
const P5: f32 = 5.000_000_1e-1;
const ROUND: f32 = 12_582_912.0; // 1.5 * 2^23: adding it rounds to an integer

pub const EXP_UNDERFLOW: f32 = -87.3;

#[inline(always)]
pub fn exp_f32(x: f32) -> f32 {
    let xc = x.clamp(EXP_UNDERFLOW, 88.3);
    let n = (xc * LOG2E + ROUND) - ROUND;
    let r = xc - n * LN2_HI - n * LN2_LO;
    let r2 = r * r;
    let mut y = P0;
    y = y * r + P1;
    y = y * r + P2;
    y = y * r + P3;
    y = y * r + P4;
    y = y * r + P5;
    y = y * r2 + r + 1.0;
    let scale = f32::from_bits(((n as i32 + 127) << 23) as u32);
    let v = y * scale;
    // clamp() maps NaN to NaN; keep it NaN, and send the underflow range to 0.
    if x < EXP_UNDERFLOW {
        0.0
    } else {
        v
    }
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
        assert!(worst < 4.0 * f32::EPSILON as f64, "worst relative error {worst}");
    }

    #[test]
    fn special_values() {
        assert_eq!(exp_f32(f32::NEG_INFINITY), 0.0);
        assert_eq!(exp_f32(-100.0), 0.0);
        assert_eq!(exp_f32(0.0), 1.0);
        assert!(exp_f32(f32::NAN).is_nan());
    }
}
