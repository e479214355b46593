//! Wider vector instructions for the dense kernels, chosen when the process starts.
//!
//! The release build targets baseline x86-64 (SSE2, two doubles per instruction) so that
//! it runs on any x86-64 server. Most servers also have AVX2 (four doubles per
//! instruction); `with_avx2_copy!` compiles a kernel twice, once for each, and calls the
//! AVX2 copy when the CPU reports AVX2. Three kernels use it today: the tiled products
//! `gemm_blocked_nn` and `gemm_blocked_nt` (`products.rs`) and `symmetric_eigen`
//! (`symmetric_eigen.rs`); each gives the two copies different block sizes (tiles of 8
//! rows or 4, rotations over 16 rows or 8), sized to the sixteen registers of each width.
//!
//! Both copies compute the same bits. Rust never fuses a multiplication and an addition
//! on its own (no floating-point contraction without an explicit `mul_add`), and LLVM
//! vectorises a sum only where the order of its additions stays as written, so wider
//! registers change how many entries go through at once, never the rounding. Only
//! `avx2` is enabled, not `fma`. The block size decides which entries share a register,
//! never the order in which one entry's terms are added. Each kernel's tests compare the
//! two copies bit for bit.
//!
//! Why a local macro rather than the `multiversion` crate: that crate clones a function
//! per target and could pick the block size per clone (its `target_cfg_f!`), but it would
//! replace these 40 lines with a procedural-macro dependency whose generated dispatch and
//! `unsafe` call are not in this file to read, and its speed against this one has not
//! been measured on a quiet machine. Until a named bench shows it equal, the dispatch
//! stays here, with its one `unsafe` call written out below.
//!
//! This macro holds the crate's only `unsafe` code (allowed on the functions it defines):
//! calling a function compiled for a CPU feature is unsafe unless the feature is known to
//! be present, and here it is checked first, on every call.

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
        $crate::linalg::dispatch::with_avx2_copy! {
            $(#[$meta])* $vis fn $name($($arg: $ty),*) $(-> $ret)? => $body, $body;
        }
    };
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? => $wide:path, $base:path;) => {
        $(#[$meta])*
        #[inline]
        // The unsafe code is this macro's, written here in src/linalg/dispatch.rs.
        #[allow(unsafe_code)]
        $vis fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                unsafe fn wide($($arg: $ty),*) $(-> $ret)? {
                    $wide($($arg),*)
                }
                if $crate::linalg::dispatch::has_avx2() {
                    // SAFETY: `wide` only needs AVX2, which the CPU has (checked just above).
                    return unsafe { wide($($arg),*) };
                }
            }
            $base($($arg),*)
        }
    };
}

pub(crate) use with_avx2_copy;
