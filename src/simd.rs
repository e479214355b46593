//! Wider vector instructions for the dense kernels, chosen when the process starts.
//!
//! The release build targets baseline x86-64 (SSE2, two doubles per instruction) so that
//! it runs on any x86-64 server. Most servers also have AVX2 (four doubles per
//! instruction); `with_avx2_copy!` compiles a kernel twice, once for each, and calls the
//! AVX2 copy when the CPU reports AVX2.
//!
//! Both copies compute the same bits. Rust never fuses a multiplication and an addition
//! on its own (no floating-point contraction without an explicit `mul_add`), and LLVM
//! vectorises a sum only where the order of its additions stays as written, so wider
//! registers change how many entries go through at once, never the rounding. Only
//! `avx2` is enabled, not `fma`. `tests` in the kernels' modules compare the two copies
//! bit for bit.
//!
//! This macro holds the crate's only `unsafe` code (allowed on the functions it defines):
//! calling a function compiled for a CPU feature is unsafe unless the feature is known to
//! be present, and here it is checked first, on every call (`is_x86_feature_detected!`
//! reads a cached flag).

/// Whether the AVX2 copies can run on this CPU.
#[inline(always)]
pub fn has_avx2() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        std::is_x86_feature_detected!("avx2")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// `with_avx2_copy!(vis fn name(args) -> R => body_fn);` defines `name`, which calls
/// `body_fn(args)` compiled for AVX2 when the CPU has it and as compiled for the baseline
/// otherwise. `body_fn` must be `#[inline(always)]` (and so must everything hot it
/// calls), or it would be compiled once, for the baseline only.
///
/// `=> wide_fn, base_fn;` names a different body for each copy (the same computation
/// blocked for the register count of each: sixteen of two doubles, or of four).
macro_rules! with_avx2_copy {
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? => $body:path;) => {
        $crate::simd::with_avx2_copy! {
            $(#[$meta])* $vis fn $name($($arg: $ty),*) $(-> $ret)? => $body, $body;
        }
    };
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? => $wide:path, $base:path;) => {
        $(#[$meta])*
        #[inline]
        // The unsafe code is this macro's, written here in src/simd.rs.
        #[allow(unsafe_code)]
        $vis fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                unsafe fn wide($($arg: $ty),*) $(-> $ret)? {
                    $wide($($arg),*)
                }
                if $crate::simd::has_avx2() {
                    // SAFETY: `wide` only needs AVX2, which the CPU has (checked just above).
                    return unsafe { wide($($arg),*) };
                }
            }
            $base($($arg),*)
        }
    };
}

pub(crate) use with_avx2_copy;
