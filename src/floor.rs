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

use crate::input::{LogitFile, StoredDtype};

/// Rounding step of `dtype` at value `x` (one unit in the last place).
pub fn step(dtype: StoredDtype, x: f32) -> f64 {
    if !x.is_finite() || x == 0.0 {
        return dtype.min_step();
    }
    let e = (x.abs() as f64).log2().floor() as i32;
    (2f64.powi(e - dtype.mantissa_bits())).max(dtype.min_step())
}

/// Expected KL from storage rounding of one row pair (computed by the
/// vectorised kernel; `step` gives the same steps one value at a time).
pub fn row_floor(x: &[f32], xd: StoredDtype, y: &[f32], yd: StoredDtype) -> f64 {
    let r = |d: StoredDtype| crate::kernel::Rounding {
        mantissa_bits: d.mantissa_bits(),
        min_exp: d.min_step().log2() as i32,
    };
    crate::kernel::storage_floor_row(x, r(xd), y, r(yd))
}

/// Mean floor over up to `max_rows` evenly spaced rows of the pair.
pub fn storage_floor(
    reference: &LogitFile,
    candidate: &LogitFile,
    cols: usize,
    max_rows: usize,
) -> f64 {
    let rows = reference.rows.min(candidate.rows);
    if rows == 0 {
        return f64::NAN;
    }
    let take = rows.min(max_rows.max(1));
    // The sampled rows in parallel (this runs after the streaming pass, on
    // its own), summed in row order so the result does not depend on threads.
    use rayon::prelude::*;
    let floors: Vec<f64> = (0..take)
        .into_par_iter()
        .map_init(
            || (vec![0f32; cols], vec![0f32; cols]),
            |(x, y), i| {
                let row = i * rows / take;
                reference.read_row(row, x);
                candidate.read_row(row, y);
                row_floor(x, reference.dtype, y, candidate.dtype)
            },
        )
        .collect();
    let (mut sum, mut n) = (0f64, 0usize);
    for f in floors.into_iter().filter(|f| f.is_finite()) {
        sum += f;
        n += 1;
    }
    if n == 0 {
        f64::NAN
    } else {
        sum / n as f64
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
