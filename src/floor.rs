//! The divergence floor that the storage dtype alone causes.
//!
//! Rounding a logit x to a format with step s(x) adds noise of variance
//! s^2/12 (uniform rounding error, common practice). For a small perturbation
//! delta of the logits, KL ~ 1/2 Var_p(delta) (second-order expansion of KL,
//! common practice). With independent noise in the reference and the
//! candidate this gives, per row,
//!     floor = 1/2 * sum_i p_i (1 - p_i) (s_ref(x_i)^2 + s_cand(y_i)^2) / 12,
//! where (1 - p_i) accounts for the shift-invariance of softmax. We evaluate it
//! on an evenly spaced sample of rows, from the stored values themselves, so a
//! raw bf16 dump around 25 shows a floor near 1e-3 nats while a centered one
//! shows a far smaller one.

use crate::input::StoredDtype;
use crate::kernel::{Rounding, Row, RowNorm};

/// Rounding step of `dtype` at value `x` (one unit in the last place).
pub fn step(dtype: StoredDtype, x: f32) -> f64 {
    if !x.is_finite() || x == 0.0 {
        return dtype.min_step();
    }
    let e = (x.abs() as f64).log2().floor() as i32;
    (2f64.powi(e - dtype.mantissa_bits())).max(dtype.min_step())
}

fn rounding(d: StoredDtype) -> Rounding {
    Rounding {
        mantissa_bits: d.mantissa_bits(),
        min_exp: d.min_step().log2() as i32,
    }
}

/// Expected KL from storage rounding of one row pair (computed by the
/// vectorised kernel; `step` gives the same steps one value at a time).
pub fn row_floor(x: &[f32], xd: StoredDtype, y: &[f32], yd: StoredDtype) -> f64 {
    crate::kernel::storage_floor_row(x, rounding(xd), y, rounding(yd))
}

/// `row_floor` inside the streaming pass, from the reference's stored
/// exponentials `e` and summary `r` (what `kernel::normalise_row` gave).
pub fn stored_row_floor(
    x: Row,
    xd: StoredDtype,
    y: Row,
    yd: StoredDtype,
    e: &[f32],
    r: &RowNorm,
) -> f64 {
    crate::kernel::storage_floor_stored(x, rounding(xd), y, rounding(yd), e, r)
}

/// The rows the floor is evaluated on: up to `FLOOR_SAMPLE_ROWS`, evenly
/// spaced over `rows` (a run, a shard and a merge all use these). The
/// engine computes the floor of each one it counts, and the report takes
/// their mean.
pub fn sample_rows(rows: usize) -> impl Iterator<Item = usize> {
    let take = rows.min(FLOOR_SAMPLE_ROWS.max(1));
    (0..take).map(move |i| i * rows / take)
}

/// Rows sampled, evenly spaced, for the storage floor.
pub const FLOOR_SAMPLE_ROWS: usize = 64;

/// The mean floor of an engine result's sampled rows; NaN without any.
pub fn mean_floor(sum: f64, rows: u64) -> f64 {
    if rows > 0 {
        sum / rows as f64
    } else {
        f64::NAN
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn steps_match_the_formats() {
        // bf16 keeps 8 significant bits: between 16 and 32 the spacing is 2^-3;
        // f16 keeps 11: 2^-6 there; f32 keeps 24: 2^-19 (IEEE 754 / bfloat16 layouts).
        assert_eq!(step(StoredDtype::BF16, 25.0), 0.125);
        assert_eq!(step(StoredDtype::F16, 25.0), 2f64.powi(-6));
        assert_eq!(step(StoredDtype::F32, 25.0), 2f64.powi(-19));
    }
}
