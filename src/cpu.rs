//! What the CPU runs, asked once per process, for the modules below `synthesis` that keep an
//! AVX2 copy of a hot loop (`encoding`, `optics::pointwise`); `synthesis::kernels` has its own
//! token with more levels. The same environment rule everywhere: `FRINGEMILL_PORTABLE=1` runs
//! the portable code only, `FRINGEMILL_NO_AVX512=1` stops at AVX2.

use std::sync::OnceLock;

/// True when the portable code is forced (`FRINGEMILL_PORTABLE=1`).
pub fn portable_forced() -> bool {
    std::env::var_os("FRINGEMILL_PORTABLE").is_some_and(|v| v == "1")
}

/// AVX2 and FMA are reported by the CPU and not switched off by `FRINGEMILL_PORTABLE=1`.
pub fn avx2_fma() -> bool {
    static AVX2: OnceLock<bool> = OnceLock::new();
    *AVX2.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            !portable_forced()
                && std::arch::is_x86_feature_detected!("avx2")
                && std::arch::is_x86_feature_detected!("fma")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
}

/// AVX-512 F, VL and DQ besides AVX2 and FMA, unless `FRINGEMILL_NO_AVX512=1` (or
/// `FRINGEMILL_PORTABLE=1`) says otherwise.
pub fn avx512() -> bool {
    static AVX512: OnceLock<bool> = OnceLock::new();
    *AVX512.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            avx2_fma()
                && std::env::var_os("FRINGEMILL_NO_AVX512").is_none_or(|v| v != "1")
                && std::arch::is_x86_feature_detected!("avx512f")
                && std::arch::is_x86_feature_detected!("avx512vl")
                && std::arch::is_x86_feature_detected!("avx512dq")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    })
}
