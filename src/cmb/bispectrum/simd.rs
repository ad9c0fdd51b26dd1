//! Run-time choice of vector instructions for the engine's hot loops that are our own
//! (the matrix products run in matrixmultiply, which chooses its own). The release build
//! targets baseline x86-64 (SSE2), so each kernel here is compiled twice: as is, and with
//! AVX2 and FMA enabled, and the wide copy runs when the CPU reports both. Rust never
//! fuses a * b + c into an FMA on its own, and each kernel fixes its summation order, so
//! both copies give the same bits.
//!
//! The audited exception to the crate's `deny(unsafe_code)`: calling a
//! `#[target_feature]` function is unsafe; it is sound after the run-time check.
#![allow(unsafe_code)]

/// Whether the CPU has AVX2 and FMA (std caches the answer).
#[inline]
fn wide() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// Defines `$name`, which runs `$imp` (an `#[inline(always)]` function) compiled with
/// AVX2 and FMA when the CPU has them, and as is otherwise.
macro_rules! dispatch {
    ($(#[$m:meta])* fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? => $imp:path) => {
        $(#[$m])*
        pub(super) fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2,fma")]
                unsafe fn avx2($($arg: $ty),*) $(-> $ret)? {
                    $imp($($arg),*)
                }
                if wide() {
                    // SAFETY: the CPU supports AVX2 and FMA (checked at run time).
                    return unsafe { avx2($($arg),*) };
                }
            }
            $imp($($arg),*)
        }
    };
}

dispatch! {
    /// The triple products of the engine (see [`super::kernel::triple_sums_impl`]).
    #[allow(clippy::too_many_arguments)]
    fn triple_sums(
        s: &[Vec<f64>],
        st: &[Vec<f64>],
        n_r: usize,
        legs: &[[super::kernel::Leg; 3]],
        w_r: &[f64],
        clip: (usize, usize),
        scale: f64,
        out: &mut [f64],
        sums: &mut [f64],
    ) => super::kernel::triple_sums_impl
}

dispatch! {
    /// The radial functions at a group of radial nodes (see
    /// [`super::plan::radial_rows_impl`]).
    fn radial_rows(ctx: &super::plan::RadialCtx<'_>, ir0: usize, out: &mut [f64]) => super::plan::radial_rows_impl
}
