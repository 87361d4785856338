//! Runs a kernel compiled for the widest vector units the processor has.
//!
//! The crate is built for the x86-64 baseline (SSE2, 4 lanes of f32), so that the program runs
//! on any laptop; the element-wise passes of the fast path are written as plain loops over
//! slices, and [`vectorised!`] compiles each one three times: for AVX-512 (x86-64-v4, 16 lanes),
//! for AVX2 with FMA (x86-64-v3, 8 lanes) and for the baseline, and picks one at run time.
//! On the 2-core test machine the AVX-512 build of the EdgeConv edge pass runs about three
//! times as fast as the baseline one.

use std::sync::OnceLock;

/// The vector units a kernel may use.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Level {
    /// AVX-512 F/BW/DQ/VL with AVX2 and FMA.
    V4,
    /// AVX2 and FMA.
    V3,
    Baseline,
}

/// What this processor has (looked up once).
pub(crate) fn level() -> Level {
    static LEVEL: OnceLock<Level> = OnceLock::new();
    *LEVEL.get_or_init(detect)
}

#[cfg(target_arch = "x86_64")]
fn detect() -> Level {
    let v3 = is_x86_feature_detected!("avx2")
        && is_x86_feature_detected!("fma")
        && is_x86_feature_detected!("bmi1")
        && is_x86_feature_detected!("bmi2")
        && is_x86_feature_detected!("lzcnt");
    let v4 = v3
        && is_x86_feature_detected!("avx512f")
        && is_x86_feature_detected!("avx512bw")
        && is_x86_feature_detected!("avx512dq")
        && is_x86_feature_detected!("avx512vl");
    if v4 {
        Level::V4
    } else if v3 {
        Level::V3
    } else {
        Level::Baseline
    }
}

#[cfg(not(target_arch = "x86_64"))]
fn detect() -> Level {
    Level::Baseline
}

/// `vectorised! { fn name(arg: Type, ..) -> Ret { body } }` defines `name`, whose body is
/// compiled for [`Level::V4`], [`Level::V3`] and the baseline; each call runs the widest this
/// processor has. Arguments are plain values or references (no generics).
macro_rules! vectorised {
    ($(#[$attr:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) $(-> $ret:ty)? $body:block) => {
        $(#[$attr])*
        #[allow(clippy::too_many_arguments)]
        $vis fn $name($($arg: $ty),*) $(-> $ret)? {
            #[inline(always)]
            #[allow(clippy::too_many_arguments)]
            fn body($($arg: $ty),*) $(-> $ret)? $body

            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx512f,avx512bw,avx512dq,avx512vl,avx2,fma,bmi1,bmi2,lzcnt")]
                #[allow(clippy::too_many_arguments)]
                fn v4($($arg: $ty),*) $(-> $ret)? {
                    body($($arg),*)
                }
                #[target_feature(enable = "avx2,fma,bmi1,bmi2,lzcnt")]
                #[allow(clippy::too_many_arguments)]
                fn v3($($arg: $ty),*) $(-> $ret)? {
                    body($($arg),*)
                }
                match $crate::net::fast::simd::level() {
                    // SAFETY: `level()` found these features on this processor.
                    $crate::net::fast::simd::Level::V4 => return unsafe { v4($($arg),*) },
                    // SAFETY: as above.
                    $crate::net::fast::simd::Level::V3 => return unsafe { v3($($arg),*) },
                    $crate::net::fast::simd::Level::Baseline => {}
                }
            }
            body($($arg),*)
        }
    };
}

pub(crate) use vectorised;

/// f32 values in the widest vector register (AVX-512): the kernels work on blocks of this
/// many channels, kept in registers, and on the rest one at a time.
pub(crate) const LANES: usize = 16;

/// `W` values of `s` from `at`, as an array the compiler keeps in registers.
///
/// Panics if `s` is shorter than `at + W`.
#[inline(always)]
pub(crate) fn load<const W: usize, T: Copy>(s: &[T], at: usize) -> [T; W] {
    *<&[T; W]>::try_from(&s[at..at + W]).expect("W values")
}

/// Writes `v` into `s` from `at`.
///
/// Panics if `s` is shorter than `at + W`.
#[inline(always)]
pub(crate) fn store<const W: usize, T: Copy>(s: &mut [T], at: usize, v: [T; W]) {
    s[at..at + W].copy_from_slice(&v);
}

#[cfg(test)]
mod tests {
    use super::*;

    vectorised! {
        fn dot(a: &[f32], b: &[f32]) -> f32 {
            a.iter().zip(b).map(|(x, y)| x * y).sum()
        }
    }

    #[test]
    fn every_level_computes_the_same() {
        // Small integers: the sum is exact in any order.
        let a: Vec<f32> = (0..100).map(|i| (i % 7) as f32).collect();
        let b: Vec<f32> = (0..100).map(|i| (i % 5) as f32 - 2.0).collect();
        let want: f32 = (0..100).map(|i| a[i] * b[i]).sum();
        assert_eq!(dot(&a, &b), want);
        // The machine these tests run on has at least the level detected; say which.
        println!("vector level: {:?}", level());
    }
}
