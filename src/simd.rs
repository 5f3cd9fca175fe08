//! The few processor-specific hints of the hot loops, behind safe functions.

/// Asks the processor to bring the cache line at `base + offset` into its caches. A
/// hint only: nothing is read, so an address past the end of `base`'s allocation is
/// harmless (the pointer is never dereferenced).
#[inline(always)]
pub fn prefetch(base: *const u8, offset: usize) {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T1};
        // SAFETY: `prefetch` needs SSE, which every x86-64 processor has, and it does not
        // access memory (it cannot fault, whatever the address).
        unsafe { _mm_prefetch::<_MM_HINT_T1>(base.wrapping_add(offset) as *const i8) };
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        let _ = (base, offset);
    }
}

/// Whether the processor has AVX2: the hot loops have a second copy compiled for it
/// (four `f64` lanes instead of two). Never FMA: fused multiply-adds round once where
/// the baseline rounds twice, and every machine must compute the same bits.
#[cfg(target_arch = "x86_64")]
#[inline]
pub fn has_avx2() -> bool {
    std::is_x86_feature_detected!("avx2")
}
