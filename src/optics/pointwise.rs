//! The pointwise products fused into the FFT passes (`v[k] *= fac[k] * scale`), with an AVX2
//! copy of the f32 case chosen at run time. The copy compiles the same source with the wider
//! vector unit enabled: complex products without fused multiply-adds (Rust does not contract
//! them), so both give the same bits. Set `FRINGEMILL_PORTABLE=1` to force the portable copy,
//! as for the point-source kernels.
//!
//! It also holds [`large_buffer`], the allocation of whole-plane buffers backed by transparent huge
//! pages where Linux offers them on request: the column passes of the 2-D FFT visit every row of a
//! plane once per strip, one 4 KiB page per row, which costs a page walk per row once a plane is
//! larger than the TLB reaches; with 2 MiB pages a 2048^2 complex f32 plane is 16 pages.

use num_complex::Complex;

#[inline(always)]
fn mul_by_generic(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
    for (a, &b) in v.iter_mut().zip(fac) {
        *a *= b * scale;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn mul_by_avx2(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
    mul_by_generic(v, fac, scale)
}

fn use_avx2() -> bool {
    crate::cpu::avx2_fma()
}

/// `v[k] *= fac[k] * scale` over the common length.
pub(crate) fn mul_by_f32(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
    #[cfg(target_arch = "x86_64")]
    if use_avx2() {
        // SAFETY: AVX2 was reported by the CPU (`use_avx2`); the body is safe code.
        return unsafe { mul_by_avx2(v, fac, scale) };
    }
    mul_by_generic(v, fac, scale)
}

/// A vector of `n` copies of `value`, its memory advised for transparent huge pages before it is
/// first written (Linux, `madvise(MADV_HUGEPAGE)`; elsewhere, or when the advice is refused, a
/// plain vector). The advice changes the page size only, never the contents.
pub fn large_buffer<T: Copy>(n: usize, value: T) -> Vec<T> {
    let mut v: Vec<T> = Vec::with_capacity(n);
    #[cfg(target_os = "linux")]
    {
        let bytes = n.saturating_mul(std::mem::size_of::<T>());
        if let Some((lo, hi)) = huge_page_range(v.as_mut_ptr() as usize, bytes) {
            // SAFETY: [lo, hi) lies inside the vector's own allocation (capacity n, not yet
            // written; `huge_page_range` keeps inside [start, start + bytes)); MADV_HUGEPAGE only
            // asks the kernel to back the range with large pages and never changes memory
            // contents or validity. A refusal is harmless.
            unsafe {
                libc::madvise(lo as *mut libc::c_void, hi - lo, libc::MADV_HUGEPAGE);
            }
        }
    }
    v.resize(n, value);
    v
}

/// Size of the large pages asked for (2 MiB, x86-64 and most arm64 kernels).
const HUGE_PAGE: usize = 2 << 20;

/// The whole large pages inside [start, start + bytes), if the buffer is at least two large pages:
/// the range [lo, hi) with lo the first page boundary at or after start and hi the last at or
/// before the end.
fn huge_page_range(start: usize, bytes: usize) -> Option<(usize, usize)> {
    if bytes < 2 * HUGE_PAGE {
        return None;
    }
    let lo = start.checked_add(HUGE_PAGE - 1)? & !(HUGE_PAGE - 1);
    let hi = start.checked_add(bytes)? & !(HUGE_PAGE - 1);
    (hi > lo).then_some((lo, hi))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Each copy (portable, and AVX2 where the CPU has it) against the plain product written
    /// here, bit for bit (IEEE products, no contraction), and the dispatched call likewise.
    #[test]
    fn dispatched_copy_matches_plain_product() {
        let fac: Vec<Complex<f32>> = (0..37)
            .map(|k| Complex::new((k as f32 * 0.37).cos(), (k as f32 * 0.91).sin()))
            .collect();
        let v0: Vec<Complex<f32>> = (0..37)
            .map(|k| Complex::new(1.0 / (k as f32 + 0.5), (k as f32).sqrt() - 3.0))
            .collect();
        let scale = Complex::new(0.6f32, -0.8);
        let slow: Vec<Complex<f32>> = v0
            .iter()
            .zip(&fac)
            .map(|(a, b)| {
                let p = Complex::new(
                    b.re * scale.re - b.im * scale.im,
                    b.re * scale.im + b.im * scale.re,
                );
                Complex::new(a.re * p.re - a.im * p.im, a.re * p.im + a.im * p.re)
            })
            .collect();
        let mut portable = v0.clone();
        mul_by_generic(&mut portable, &fac, scale);
        assert_eq!(portable, slow, "portable copy");
        let mut dispatched = v0.clone();
        mul_by_f32(&mut dispatched, &fac, scale);
        assert_eq!(dispatched, slow, "dispatched copy");
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            let mut wide = v0.clone();
            // SAFETY: AVX2 was just reported by the CPU.
            unsafe { mul_by_avx2(&mut wide, &fac, scale) };
            assert_eq!(wide, slow, "AVX2 copy");
        } else {
            eprintln!("no AVX2 on this CPU: the portable copy alone was compared");
        }
    }

    /// The advised range: whole 2 MiB pages inside the buffer, none for small buffers (common
    /// practice: an allocation hint must stay inside the allocation).
    #[test]
    fn huge_page_range_stays_inside_the_buffer() {
        let m = HUGE_PAGE;
        assert_eq!(huge_page_range(0x1000, 2 * m - 1), None);
        assert_eq!(huge_page_range(4 * m, 2 * m), Some((4 * m, 6 * m)));
        assert_eq!(huge_page_range(4 * m + 8, 3 * m), Some((5 * m, 7 * m)));
        // Less than one whole page inside after alignment.
        assert_eq!(huge_page_range(4 * m + 8, 2 * m), Some((5 * m, 6 * m)));
        assert_eq!(huge_page_range(usize::MAX - m, 2 * m), None);
        for (start, bytes) in [(12345usize, 5 * m + 77), (m - 1, 2 * m + 1), (3 * m, 9 * m)] {
            let (lo, hi) = huge_page_range(start, bytes).unwrap();
            assert!(lo >= start && hi <= start + bytes && lo % m == 0 && hi % m == 0 && hi > lo);
            assert!(
                lo - start < m && start + bytes - hi < m,
                "a whole page left out"
            );
        }
    }

    /// The advised buffer holds what a plain vector holds, for sizes below, at and above the
    /// threshold (common practice: an allocation hint must not change contents).
    #[test]
    fn large_buffer_is_a_plain_vector() {
        for n in [0usize, 1, 1000, 1 << 20, (1 << 20) + 3] {
            let v = large_buffer(n, Complex::new(1.5f32, -2.0));
            assert_eq!(v.len(), n);
            assert!(v.iter().all(|c| *c == Complex::new(1.5, -2.0)));
        }
    }
}
