//! The pointwise products fused into the FFT passes (`v[k] *= fac[k] * scale`), with an AVX2
//! copy of the f32 case chosen at run time. The copy compiles the same source with the wider
//! vector unit enabled: complex products without fused multiply-adds (Rust does not contract
//! them), so both give the same bits. Set `FRINGEMILL_PORTABLE=1` to force the portable copy,
//! as for the point-source kernels.

use std::sync::OnceLock;

use num_complex::Complex;

#[inline(always)]
fn mul_by_generic(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
    for (a, &b) in v.iter_mut().zip(fac) {
        *a = *a * (b * scale);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn mul_by_avx2(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
    mul_by_generic(v, fac, scale)
}

fn use_avx2() -> bool {
    static AVX2: OnceLock<bool> = OnceLock::new();
    *AVX2.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            std::env::var_os("FRINGEMILL_PORTABLE").is_none()
                && std::arch::is_x86_feature_detected!("avx2")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The dispatched copy against the plain product, bit for bit (IEEE products, no contraction).
    #[test]
    fn dispatched_copy_matches_plain_product() {
        let fac: Vec<Complex<f32>> = (0..37)
            .map(|k| Complex::new((k as f32 * 0.37).cos(), (k as f32 * 0.91).sin()))
            .collect();
        let v0: Vec<Complex<f32>> = (0..37)
            .map(|k| Complex::new(1.0 / (k as f32 + 0.5), (k as f32).sqrt() - 3.0))
            .collect();
        let scale = Complex::new(0.6f32, -0.8);
        let mut fast = v0.clone();
        mul_by_f32(&mut fast, &fac, scale);
        let slow: Vec<Complex<f32>> = v0.iter().zip(&fac).map(|(a, b)| a * (b * scale)).collect();
        assert_eq!(fast, slow);
    }
}
