//! A row as it is stored, read sixteen columns at a time.
//!
//! The kernel passes read the stored bytes themselves (f32, IEEE f16 or
//! bf16, little-endian, any alignment) and widen each 16-column chunk to f32
//! in registers as they go, instead of first decoding the whole row into a
//! buffer: a 128k-column row decoded to f32 is 512 KB, which would be written
//! and read back through the cache on every pass. Widening is exact for every
//! value of every format, so a pass gives the same bits whichever form it
//! reads.

use super::lanes::{F, W};

/// One row of stored logits: the raw little-endian bytes and their format.
#[derive(Debug, Clone, Copy)]
pub enum Row<'a> {
    F32(&'a [u8]),
    F16(&'a [u8]),
    Bf16(&'a [u8]),
}

impl<'a> Row<'a> {
    /// An f32 row already in memory.
    pub fn from_f32(x: &'a [f32]) -> Row<'a> {
        Row::F32(bytemuck::cast_slice(x))
    }

    /// Number of columns.
    pub fn len(self) -> usize {
        match self {
            Row::F32(b) => b.len() / 4,
            Row::F16(b) | Row::Bf16(b) => b.len() / 2,
        }
    }

    pub fn is_empty(self) -> bool {
        self.len() == 0
    }

    /// The first `n` columns.
    pub fn prefix(self, n: usize) -> Row<'a> {
        match self {
            Row::F32(b) => Row::F32(&b[..4 * n]),
            Row::F16(b) => Row::F16(&b[..2 * n]),
            Row::Bf16(b) => Row::Bf16(&b[..2 * n]),
        }
    }

    /// Column `i` as f32.
    #[inline]
    pub fn get(self, i: usize) -> f32 {
        match self {
            Row::F32(b) => F32Le(b).at(i),
            Row::F16(b) => F16Le(b).at(i),
            Row::Bf16(b) => Bf16Le(b).at(i),
        }
    }
}

/// bf16 to f32: the 16 stored bits are the high half of the f32.
#[inline(always)]
pub fn bf16_to_f32(h: u16) -> f32 {
    f32::from_bits((h as u32) << 16)
}

/// 2^112: moves an f16 exponent (bias 15) to an f32 one (bias 127).
const F16_SCALE: f32 = 5.192_297e33;

/// IEEE half to single, exact for every input: the 15 magnitude bits moved
/// into an f32 and scaled by 2^112 (normals and subnormals alike), infinities
/// and NaNs rebuilt with the top exponent, then the sign.
#[inline(always)]
pub fn f16_to_f32(h: u16) -> f32 {
    let h = h as u32;
    let em = h & 0x7fff;
    let mag = f32::from_bits(em << 13) * F16_SCALE;
    let mag = if em >= 0x7c00 {
        f32::from_bits((em << 13) | 0x7f80_0000)
    } else {
        mag
    };
    f32::from_bits(mag.to_bits() | ((h & 0x8000) << 16))
}

/// What a kernel pass reads: `len` columns, one at a time or sixteen at a
/// time, widened to f32. `chunk::<L>` is built for kernel level `L` (see
/// `kernel::Level`); every level gives the same values.
#[allow(clippy::len_without_is_empty)]
pub trait Src: Copy {
    fn len(self) -> usize;
    fn at(self, i: usize) -> f32;
    /// Columns i .. i + 16.
    ///
    /// # Safety
    /// The caller keeps i + 16 <= len: the hot loops test that bound once
    /// per chunk anyway, and a second check per load costs them measurably.
    unsafe fn chunk<const L: u8>(self, i: usize) -> F;
    /// Columns lo .. hi (fewer than 16) followed by `fill`.
    #[inline(always)]
    fn padded(self, lo: usize, hi: usize, fill: f32) -> F {
        let mut v = [fill; W];
        for (o, i) in v.iter_mut().zip(lo..hi) {
            *o = self.at(i);
        }
        v
    }
    /// Columns i .. i + 8 in one AVX2 register: the AVX2 loops
    /// (`kernel::avx2`) take each 16-lane chunk as two such halves.
    ///
    /// # Safety
    /// i + 8 <= len, and only called from code compiled with AVX2 and F16C,
    /// after run-time detection.
    #[cfg(target_arch = "x86_64")]
    unsafe fn half(self, i: usize) -> std::arch::x86_64::__m256;
}

#[derive(Clone, Copy)]
pub struct F32Le<'a>(pub &'a [u8]);
#[derive(Clone, Copy)]
pub struct F16Le<'a>(pub &'a [u8]);
#[derive(Clone, Copy)]
pub struct Bf16Le<'a>(pub &'a [u8]);

#[inline(always)]
fn u16_at(b: &[u8], i: usize) -> u16 {
    u16::from_le_bytes([b[2 * i], b[2 * i + 1]])
}

impl Src for F32Le<'_> {
    #[inline(always)]
    fn len(self) -> usize {
        self.0.len() / 4
    }
    #[inline(always)]
    fn at(self, i: usize) -> f32 {
        let b = &self.0[4 * i..4 * i + 4];
        f32::from_le_bytes([b[0], b[1], b[2], b[3]])
    }
    #[inline(always)]
    unsafe fn chunk<const L: u8>(self, i: usize) -> F {
        debug_assert!(4 * (i + W) <= self.0.len());
        // SAFETY: the caller keeps i + 16 <= len, so the 64 bytes are inside.
        let b = unsafe { self.0.get_unchecked(4 * i..4 * i + 4 * W) };
        if cfg!(target_endian = "little") {
            // SAFETY: `b` holds exactly 64 bytes, every bit pattern is a
            // valid f32, and the read is unaligned.
            unsafe { std::ptr::read_unaligned(b.as_ptr() as *const F) }
        } else {
            let mut v = [0f32; W];
            for (j, o) in v.iter_mut().enumerate() {
                *o = f32::from_le_bytes([b[4 * j], b[4 * j + 1], b[4 * j + 2], b[4 * j + 3]]);
            }
            v
        }
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn half(self, i: usize) -> std::arch::x86_64::__m256 {
        debug_assert!(4 * (i + 8) <= self.0.len());
        // SAFETY: the caller keeps i + 8 <= len and runs with AVX2.
        unsafe { std::arch::x86_64::_mm256_loadu_ps(self.0.as_ptr().add(4 * i) as *const f32) }
    }
}

impl Src for Bf16Le<'_> {
    #[inline(always)]
    fn len(self) -> usize {
        self.0.len() / 2
    }
    #[inline(always)]
    fn at(self, i: usize) -> f32 {
        bf16_to_f32(u16_at(self.0, i))
    }
    #[inline(always)]
    unsafe fn chunk<const L: u8>(self, i: usize) -> F {
        debug_assert!(2 * (i + W) <= self.0.len());
        // SAFETY: the caller keeps i + 16 <= len, so the 32 bytes are inside.
        let b = unsafe { self.0.get_unchecked(2 * i..2 * i + 2 * W) };
        #[cfg(all(target_arch = "x86_64", target_endian = "little"))]
        if L >= 1 {
            use std::arch::x86_64::*;
            let mut v = [0f32; W];
            // SAFETY: levels 1 and 2 are only instantiated inside functions
            // compiled with AVX2 (and AVX-512F for level 2), called after
            // run-time detection; `b` holds exactly 32 bytes and `v` 64.
            unsafe {
                if L >= 2 {
                    let h = _mm256_loadu_si256(b.as_ptr() as *const __m256i);
                    let w = _mm512_slli_epi32::<16>(_mm512_cvtepu16_epi32(h));
                    _mm512_storeu_ps(v.as_mut_ptr(), _mm512_castsi512_ps(w));
                } else {
                    for q in 0..2 {
                        _mm256_storeu_ps(v.as_mut_ptr().add(8 * q), self.half(i + 8 * q));
                    }
                }
            }
            return v;
        }
        let mut v = [0f32; W];
        for (j, o) in v.iter_mut().enumerate() {
            *o = bf16_to_f32(u16_at(b, j));
        }
        v
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn half(self, i: usize) -> std::arch::x86_64::__m256 {
        use std::arch::x86_64::*;
        debug_assert!(2 * (i + 8) <= self.0.len());
        // SAFETY: the caller keeps i + 8 <= len and runs with AVX2.
        unsafe {
            let h = _mm_loadu_si128(self.0.as_ptr().add(2 * i) as *const __m128i);
            _mm256_castsi256_ps(_mm256_slli_epi32::<16>(_mm256_cvtepu16_epi32(h)))
        }
    }
}

impl Src for F16Le<'_> {
    #[inline(always)]
    fn len(self) -> usize {
        self.0.len() / 2
    }
    #[inline(always)]
    fn at(self, i: usize) -> f32 {
        f16_to_f32(u16_at(self.0, i))
    }
    #[inline(always)]
    unsafe fn chunk<const L: u8>(self, i: usize) -> F {
        debug_assert!(2 * (i + W) <= self.0.len());
        // SAFETY: the caller keeps i + 16 <= len, so the 32 bytes are inside.
        let b = unsafe { self.0.get_unchecked(2 * i..2 * i + 2 * W) };
        #[cfg(all(target_arch = "x86_64", target_endian = "little"))]
        if L >= 1 {
            use std::arch::x86_64::*;
            let mut v = [0f32; W];
            // SAFETY: as for bf16; the vector levels enable F16C, whose
            // conversion is exact for every half (NaNs stay NaN).
            unsafe {
                if L >= 2 {
                    let h = _mm256_loadu_si256(b.as_ptr() as *const __m256i);
                    _mm512_storeu_ps(v.as_mut_ptr(), _mm512_cvtph_ps(h));
                } else {
                    for q in 0..2 {
                        _mm256_storeu_ps(v.as_mut_ptr().add(8 * q), self.half(i + 8 * q));
                    }
                }
            }
            return v;
        }
        let mut v = [0f32; W];
        for (j, o) in v.iter_mut().enumerate() {
            *o = f16_to_f32(u16_at(b, j));
        }
        v
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn half(self, i: usize) -> std::arch::x86_64::__m256 {
        use std::arch::x86_64::*;
        debug_assert!(2 * (i + 8) <= self.0.len());
        // SAFETY: the caller keeps i + 8 <= len and runs with AVX2 and F16C.
        unsafe { _mm256_cvtph_ps(_mm_loadu_si128(self.0.as_ptr().add(2 * i) as *const __m128i)) }
    }
}

/// Runs `$body` with `$s` bound to the typed reader of `$row`, so each
/// stored format gets its own compiled copy of the pass.
macro_rules! with_src {
    ($row:expr, $s:ident => $body:expr) => {
        match $row {
            $crate::kernel::row::Row::F32(b) => {
                let $s = $crate::kernel::row::F32Le(b);
                $body
            }
            $crate::kernel::row::Row::F16(b) => {
                let $s = $crate::kernel::row::F16Le(b);
                $body
            }
            $crate::kernel::row::Row::Bf16(b) => {
                let $s = $crate::kernel::row::Bf16Le(b);
                $body
            }
        }
    };
}
pub(crate) use with_src;
