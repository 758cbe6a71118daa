//! Working buffers that start on a cache-line boundary.
//!
//! The kernel's passes read and write 64 bytes (16 f32 lanes) at a time.
//! A `Vec<f32>` of a row's length came from the allocator (glibc, which
//! maps such sizes) 16 bytes past a page boundary, its own header, so every one of those
//! accesses straddles two cache lines. Starting the buffers on a line
//! boundary made the fused pass 1.04x faster on AVX-512 (`kernel_ab.py
//! --alternate`, fastest of 10; see DEVELOPERS.md).

use std::ops::{Deref, DerefMut};

/// One cache line of storage.
#[derive(Clone, Copy)]
#[repr(C, align(64))]
struct Line([u8; 64]);

/// Element types an `Aligned` buffer may hold: plain numbers for which the
/// all-zero bytes are a valid value (zero) and whose size divides 64.
pub trait Plain: Copy + private::Sealed {}
impl Plain for f32 {}
impl Plain for u8 {}

mod private {
    pub trait Sealed {}
    impl Sealed for f32 {}
    impl Sealed for u8 {}
}

/// A zero-initialised buffer of `T` whose first element sits on a 64-byte
/// boundary; dereferences to `[T]`.
#[derive(Clone)]
pub struct Aligned<T: Plain> {
    lines: Vec<Line>,
    len: usize,
    _t: std::marker::PhantomData<T>,
}

impl<T: Plain> Aligned<T> {
    const PER_LINE: usize = 64 / std::mem::size_of::<T>();

    /// `len` zeros.
    pub fn zeroed(len: usize) -> Aligned<T> {
        let mut a = Aligned {
            lines: Vec::new(),
            len: 0,
            _t: std::marker::PhantomData,
        };
        a.resize(len);
        a
    }

    /// Sets the length to `len`; elements past the old length read as
    /// zero the first time the buffer grows over them, and keep whatever
    /// was last written there otherwise (callers overwrite what they use).
    pub fn resize(&mut self, len: usize) {
        let lines = len.div_ceil(Self::PER_LINE);
        if lines > self.lines.len() {
            self.lines.resize(lines, Line([0; 64]));
        }
        self.len = len;
    }
}

impl<T: Plain> Deref for Aligned<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        // SAFETY: `lines` holds at least len * size_of::<T>() initialised
        // bytes (resize keeps lines.len() * PER_LINE >= len); `Line` is
        // 64-aligned, so the pointer is aligned for T (size and alignment of
        // f32 and u8 divide 64); every bit pattern of those bytes is a
        // valid T (`Plain` is only f32 and u8).
        unsafe { std::slice::from_raw_parts(self.lines.as_ptr() as *const T, self.len) }
    }
}

impl<T: Plain> DerefMut for Aligned<T> {
    fn deref_mut(&mut self) -> &mut [T] {
        // SAFETY: as in `deref`, with the unique borrow of `lines`.
        unsafe { std::slice::from_raw_parts_mut(self.lines.as_mut_ptr() as *mut T, self.len) }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn starts_on_a_line_and_keeps_its_length() {
        for len in [0, 1, 15, 16, 17, 128_256] {
            let mut a = Aligned::<f32>::zeroed(len);
            assert_eq!(a.len(), len);
            assert_eq!(a.as_ptr() as usize % 64, 0);
            assert!(a.iter().all(|&v| v == 0.0));
            if len > 0 {
                a[len - 1] = 2.5;
                assert_eq!(a[len - 1], 2.5);
            }
            let mut b = Aligned::<u8>::zeroed(len);
            assert_eq!(b.as_ptr() as usize % 64, 0);
            b.resize(len + 100);
            assert_eq!(b.len(), len + 100);
            assert!(b[len..].iter().all(|&v| v == 0));
            b.resize(3);
            assert_eq!(b.len(), 3);
        }
    }
}
