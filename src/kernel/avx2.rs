//! The AVX2 build's two hottest loops, on named registers.
//!
//! The kernel's lanes are sixteen wide (see `lanes`): one register with
//! AVX-512, two with AVX2. Written over `[f32; 16]` arrays, the AVX2 build
//! of the fused pass keeps five running sums (ten registers) beside its
//! inputs and constants, more than the sixteen ymm registers there are, and
//! LLVM moved them through the stack on every chunk; the normalising pass
//! kept its sums of a block in memory too. Counted with callgrind on a
//! 128k-column bf16 row, the array form executed about 60 instructions per
//! eight columns in the normalising pass and 72 in the fused pass.
//!
//! These loops do the same arithmetic on the same lanes in the same order,
//! holding each sixteen-lane sum as two `__m256` values: lanes 0..8 and
//! 8..16 of every chunk. Each lane adds the same columns in the same order
//! as the generic loops, so the results are their bits (tested against the
//! generic level-1 build in `kernel::tests`). Only whole NORM_BLOCK blocks
//! run here; a row's last partial block, and the rare chunk of the fused
//! pass that needs exp, go through the generic code on the same sums.

use super::exp::{exp_table8, ExpK8};
use super::lanes::{hsum64, hsum_wide, widen_add, F, W};
use super::row::Src;
use super::{
    exp_block, fused_block, fused_step, norm_blocks, Ahead, FusedConsts, FusedLanes, FUSED_CARRY,
    FUSED_SERIES_BELOW, G_LONG, G_SHORT, NORM_BLOCK, SERIES_BELOW,
};
use std::arch::x86_64::*;

/// A sixteen-lane value as two registers: lanes 0..8, lanes 8..16.
type Pair = [__m256; 2];

#[inline(always)]
unsafe fn pair(v: &F) -> Pair {
    // SAFETY: both loads read inside the 16 values of `v`.
    unsafe {
        [
            _mm256_loadu_ps(v.as_ptr()),
            _mm256_loadu_ps(v.as_ptr().add(8)),
        ]
    }
}

#[inline(always)]
unsafe fn unpair(p: Pair) -> F {
    let mut v = [0f32; W];
    // SAFETY: both stores write inside the 16 values of `v`.
    unsafe {
        _mm256_storeu_ps(v.as_mut_ptr(), p[0]);
        _mm256_storeu_ps(v.as_mut_ptr().add(8), p[1]);
    }
    v
}

/// Keeps two running sums where the source puts them: an empty asm
/// statement that LLVM must treat as reading and writing both, ordered
/// with the loop's stores. Without it LLVM moved the sums of a whole
/// unrolled block after its last exp, and kept eight exps' values on the
/// stack until then.
#[inline]
#[target_feature(enable = "avx")]
unsafe fn pin(a: &mut __m256, b: &mut __m256) {
    // SAFETY: an empty statement; it only names the two registers.
    unsafe {
        std::arch::asm!(
            "/* {0} {1} */",
            inout(ymm_reg) * a,
            inout(ymm_reg) * b,
            options(nostack, preserves_flags)
        );
    }
}

#[inline(always)]
fn zero() -> Pair {
    // SAFETY: setzero needs no CPU feature beyond AVX, which the AVX2
    // build has.
    unsafe { [_mm256_setzero_ps(); 2] }
}

/// The normalising pass (`kernel::exp_pass` at level 1, to the bit).
///
/// # Safety
/// Runs with AVX2 and FMA; `e` holds the row where STORE and `blocks` its
/// `norm_blocks` entries.
#[inline(always)]
pub(super) unsafe fn exp_pass<const STORE: bool, S: Src>(
    x: S,
    m: f32,
    e: &mut [f32],
    blocks: &mut [f64],
    ahead: Ahead,
) -> (f64, f64) {
    let n = x.len();
    let nb = norm_blocks(n);
    let whole = n / NORM_BLOCK;
    assert!(
        blocks.len() >= nb && (!STORE || e.len() >= n),
        "normalise: buffers shorter than the row"
    );
    let mut sums = NormSums {
        total: 0.0,
        t_acc: [0f64; W],
    };
    // SAFETY: the caller runs with AVX2 and FMA; every column read or
    // stored lies below whole * NORM_BLOCK <= n (asserted above).
    unsafe {
        let mv = _mm256_set1_ps(m);
        let k = ExpK8::new();
        for b in 0..whole {
            ahead.block(b, nb);
            let lo = b * NORM_BLOCK;
            let (mut s, mut t) = (zero(), zero());
            // Half by half: lane j of half h sums the columns c + 8h + j
            // in the same order as the generic loop, with only one half's
            // two sums live beside the constants.
            for h in 0..2 {
                let mut c = lo + 8 * h;
                while c < lo + NORM_BLOCK {
                    let xv = _mm256_sub_ps(x.half(c), mv);
                    let (ev, keep) = exp_table8(xv, &k);
                    s[h] = _mm256_add_ps(s[h], ev);
                    // Lanes below the underflow bound (e = 0) add 0 * 0:
                    // t unchanged, as the generic loop's skip, without the
                    // NaN that -inf * 0 would make.
                    t[h] = _mm256_fmadd_ps(_mm256_and_ps(xv, keep), ev, t[h]);
                    if STORE {
                        _mm256_storeu_ps(e.as_mut_ptr().add(c), ev);
                    }
                    pin(&mut s[h], &mut t[h]);
                    c += W;
                }
            }
            sums.fold(b, s, t, blocks);
        }
        if whole * NORM_BLOCK < n {
            // The row's last, partial block: the generic code.
            ahead.block(whole, nb);
            let (s, t) = exp_block::<1, STORE, false, S>(
                x,
                whole * NORM_BLOCK,
                n,
                m,
                e,
                &[],
                0.0,
                &mut [0f32; W],
            );
            sums.fold(whole, pair(&s), pair(&t), blocks);
        }
    }
    (sums.total, hsum64(&sums.t_acc))
}

/// What the normalising pass carries from block to block: the sum of the
/// block sums, and the f64 lanes of t.
struct NormSums {
    total: f64,
    t_acc: [f64; W],
}

impl NormSums {
    /// Block b's lane sums of e (`s`) and (x - m) e (`t`): its sum into
    /// `blocks` and the total, t into the carried sums.
    #[inline(always)]
    unsafe fn fold(&mut self, b: usize, s: Pair, t: Pair, blocks: &mut [f64]) {
        // SAFETY: the caller runs with AVX2; plain vector adds and stores.
        unsafe {
            let v = hsum_wide::<1>(&unpair(s));
            blocks[b] = v;
            self.total += v;
            widen_add::<1>(&mut self.t_acc, &unpair(t));
        }
    }
}

/// `kernel::g_series` on eight lanes (the same operations).
#[inline(always)]
unsafe fn g_series8<const LONG: bool>(d: __m256) -> __m256 {
    // SAFETY: the caller runs with AVX2 and FMA.
    unsafe {
        let k = _mm256_set1_ps;
        let ma = |a: __m256, b: __m256, c: __m256| _mm256_fmadd_ps(a, b, c);
        let d2 = _mm256_mul_ps(d, d);
        let p = if LONG {
            let c = &G_LONG;
            let d4 = _mm256_mul_ps(d2, d2);
            let lo = ma(d2, ma(k(c[3]), d, k(c[2])), ma(k(c[1]), d, k(c[0])));
            let hi = ma(d2, ma(k(c[7]), d, k(c[6])), ma(k(c[5]), d, k(c[4])));
            ma(d4, hi, lo)
        } else {
            let c = &G_SHORT;
            let mid = ma(d2, ma(k(c[5]), d, k(c[4])), ma(k(c[3]), d, k(c[2])));
            ma(d2, mid, ma(k(c[1]), d, k(c[0])))
        };
        _mm256_mul_ps(d2, p)
    }
}

/// The running sums of the fused pass in registers (see `FusedLanes`).
struct Sums {
    g: Pair,
    j: Pair,
    t: Pair,
    my: Pair,
    long: bool,
}

impl Sums {
    #[inline(always)]
    unsafe fn load(s: &FusedLanes) -> Sums {
        // SAFETY: plain loads of the arrays.
        unsafe {
            Sums {
                g: pair(&s.g),
                j: pair(&s.j),
                t: pair(&s.t),
                my: pair(&s.my),
                long: s.long,
            }
        }
    }

    #[inline(always)]
    unsafe fn store(&self, s: &mut FusedLanes) {
        // SAFETY: plain stores into the arrays.
        unsafe {
            s.g = unpair(self.g);
            s.j = unpair(self.j);
            s.t = unpair(self.t);
            s.my = unpair(self.my);
        }
        s.long = self.long;
    }
}

/// `kernel::fused_close` on the two halves of one chunk; v is stored at
/// `vout` (16 columns).
#[inline(always)]
#[allow(clippy::too_many_arguments)]
unsafe fn close<const LONG: bool>(
    d: &Pair,
    xs: &Pair,
    y: &Pair,
    er: *const f32,
    vout: *mut f32,
    r: &mut Sums,
    vb: &mut Pair,
) {
    // SAFETY: the caller runs with AVX2 and FMA and passes pointers to 16
    // readable (er) and writable (vout) columns.
    unsafe {
        for h in 0..2 {
            let e = _mm256_loadu_ps(er.add(8 * h));
            let gd = g_series8::<LONG>(d[h]);
            // close_v: e g(d) - e d, with e d rounded first.
            let v = _mm256_fmsub_ps(e, gd, _mm256_mul_ps(e, d[h]));
            r.g[h] = _mm256_fmadd_ps(e, gd, r.g[h]);
            r.j[h] = _mm256_fmadd_ps(v, d[h], r.j[h]);
            r.t[h] = _mm256_fmadd_ps(v, xs[h], r.t[h]);
            vb[h] = _mm256_add_ps(vb[h], v);
            r.my[h] = _mm256_max_ps(y[h], r.my[h]);
            _mm256_storeu_ps(vout.add(8 * h), v);
        }
    }
}

/// Whether both halves are below `bound` in every lane (NaN lanes are not).
#[inline(always)]
unsafe fn all_below(v: &Pair, bound: __m256) -> bool {
    // SAFETY: the caller runs with AVX2.
    unsafe {
        let ok = _mm256_and_ps(
            _mm256_cmp_ps::<_CMP_LT_OQ>(v[0], bound),
            _mm256_cmp_ps::<_CMP_LT_OQ>(v[1], bound),
        );
        _mm256_movemask_ps(ok) == 0xff
    }
}

/// The fused pass's loop (`kernel::fused_loop` at level 1, to the bit):
/// adds the row to `s` and `acc` (carried as the generic loop carries
/// them), writes v into `vbuf` and the block sums of v into `bw`; returns
/// the sum of v.
///
/// # Safety
/// Runs with AVX2 and FMA; `y`, `er`, `vbuf` hold x.len() columns and `bw`
/// its `norm_blocks` entries.
#[inline(always)]
#[allow(clippy::too_many_arguments)]
pub(super) unsafe fn fused_loop<const OFF: bool, SX: Src, SY: Src>(
    x: SX,
    y: SY,
    er: &[f32],
    k: &FusedConsts,
    s: &mut FusedLanes,
    acc: &mut [[f64; W]; 3],
    vbuf: &mut [f32],
    bw: &mut [f64],
    ahead: Ahead,
) -> f64 {
    let n = x.len();
    let nb = norm_blocks(n);
    let whole = n / NORM_BLOCK;
    assert!(
        y.len() == n && er.len() >= n && vbuf.len() >= n && bw.len() >= nb,
        "compare_fused: row or buffer lengths differ"
    );
    let mut vtot = 0f64;
    // SAFETY: the caller runs with AVX2 and FMA; a whole block's columns
    // lie below whole * NORM_BLOCK <= n (asserted above).
    unsafe {
        let set = _mm256_set1_ps;
        let (sx, sy, kc) = (set(k.sx), set(k.sy), set(k.kc));
        let short2 = set(SERIES_BELOW * SERIES_BELOW);
        let long2 = set(FUSED_SERIES_BELOW * FUSED_SERIES_BELOW);
        let mut r = Sums::load(s);
        // b indexes the row's columns as well as `bw`.
        #[allow(clippy::needless_range_loop)]
        for b in 0..nb {
            ahead.block(b, nb);
            let lo = b * NORM_BLOCK;
            let vb = if b < whole {
                let mut vb = zero();
                let mut c = lo;
                while c < lo + NORM_BLOCK {
                    let xv = [x.half(c), x.half(c + 8)];
                    let yv = [y.half(c), y.half(c + 8)];
                    let (mut xs, mut d, mut d2) = (xv, zero(), zero());
                    for h in 0..2 {
                        // As fused_step: relative to each row's top value
                        // (OFF), else from x - y directly.
                        if OFF {
                            xs[h] = _mm256_sub_ps(xv[h], sx);
                            d[h] =
                                _mm256_sub_ps(_mm256_sub_ps(xs[h], _mm256_sub_ps(yv[h], sy)), kc);
                        } else {
                            d[h] = _mm256_sub_ps(_mm256_sub_ps(xv[h], yv[h]), kc);
                        }
                        d2[h] = _mm256_mul_ps(d[h], d[h]);
                    }
                    let (ep, vp) = (er.as_ptr().add(c), vbuf.as_mut_ptr().add(c));
                    if !r.long && all_below(&d2, short2) {
                        close::<false>(&d, &xs, &yv, ep, vp, &mut r, &mut vb);
                    } else if all_below(&d2, long2) {
                        r.long = true;
                        close::<true>(&d, &xs, &yv, ep, vp, &mut r, &mut vb);
                    } else {
                        // A column far from the series range: the generic
                        // step, on the same sums.
                        r.store(s);
                        let mut vbf = unpair(vb);
                        let ec = std::ptr::read_unaligned(ep as *const F);
                        let v = fused_step::<1, OFF>(&unpair(xv), &unpair(yv), &ec, k, s, &mut vbf);
                        std::ptr::write_unaligned(vp as *mut F, v);
                        r = Sums::load(s);
                        vb = pair(&vbf);
                    }
                    c += W;
                }
                unpair(vb)
            } else {
                // The row's last, partial block: the generic code.
                r.store(s);
                let vb = fused_block::<1, OFF, false, SX, SY>(
                    x,
                    y,
                    er,
                    k,
                    s,
                    vbuf,
                    lo,
                    n,
                    0.0,
                    &mut [0f32; W],
                );
                r = Sums::load(s);
                vb
            };
            let v = hsum_wide::<1>(&vb);
            bw[b] = v;
            vtot += v;
            if b % FUSED_CARRY == FUSED_CARRY - 1 {
                r.store(s);
                s.carry::<1>(acc, ((b + 1) * NORM_BLOCK).min(n));
                r = Sums::load(s);
            }
        }
        r.store(s);
        s.carry::<1>(acc, n);
    }
    vtot
}
