//! Which SIMD build of an inner loop runs: the target's baseline instruction set, or on
//! x86-64 the same code compiled with AVX2 or with AVX-512, chosen once from what the
//! processor has.
//!
//! The loops that use this ([`crate::kernel`]'s level and surface steps, the decoding pass of
//! [`crate::ingest`]) are written without a branch on the data, so that the compiler turns
//! them into SIMD lanes of whatever width the build allows; `lane_builds!` compiles one
//! such body three times and dispatches on a [`Lanes`]. Every build does the same IEEE
//! operations in the same order (no fused multiply-add is enabled), so all three give the
//! same bits; `tests/kernel.rs` checks that on the builds this processor has.

/// A build of the inner loops, narrowest first.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Lanes {
    /// The target's baseline instruction set (SSE2 on x86-64: two `f64` lanes).
    Portable,
    /// AVX2: four `f64` or eight `f32` lanes.
    Avx2,
    /// AVX-512 (F, VL, DQ and BW): eight `f64` or sixteen `f32` lanes.
    Avx512,
}

impl Lanes {
    /// Every build, narrowest first.
    pub const ALL: [Lanes; 3] = [Lanes::Portable, Lanes::Avx2, Lanes::Avx512];

    /// Whether this processor runs the build.
    pub fn available(self) -> bool {
        match self {
            Lanes::Portable => true,
            #[cfg(target_arch = "x86_64")]
            Lanes::Avx2 => std::is_x86_feature_detected!("avx2"),
            #[cfg(target_arch = "x86_64")]
            Lanes::Avx512 => {
                std::is_x86_feature_detected!("avx2")
                    && std::is_x86_feature_detected!("avx512f")
                    && std::is_x86_feature_detected!("avx512vl")
                    && std::is_x86_feature_detected!("avx512dq")
                    && std::is_x86_feature_detected!("avx512bw")
            }
            #[cfg(not(target_arch = "x86_64"))]
            _ => false,
        }
    }

    /// The widest build this processor runs.
    pub fn widest() -> Lanes {
        Lanes::widest_up_to(Lanes::Avx512)
    }

    /// The widest build this processor runs that is no wider than `limit`.
    pub fn widest_up_to(limit: Lanes) -> Lanes {
        Lanes::ALL
            .into_iter()
            .rev()
            .find(|l| *l <= limit && l.available())
            .unwrap_or(Lanes::Portable)
    }

    /// A short name for logs and benchmark notes: `portable`, `avx2` or `avx512`.
    pub fn name(self) -> &'static str {
        match self {
            Lanes::Portable => "portable",
            Lanes::Avx2 => "avx2",
            Lanes::Avx512 => "avx512",
        }
    }
}

/// Defines `fn $name(lanes: Lanes, args…) -> R` that runs `$body(args…)` compiled for the
/// build `lanes` names: the baseline instruction set, AVX2 or AVX-512. A build the processor
/// lacks falls back to the next narrower one, so any `Lanes` is safe to pass.
///
/// `$body` must be `#[inline(always)]`, so that each build compiles its own copy of it.
macro_rules! lane_builds {
    ($(#[$doc:meta])* fn $name:ident($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty = $body:path;) => {
        $(#[$doc])*
        #[inline]
        fn $name(lanes: $crate::lanes::Lanes, $($arg: $ty),*) -> $ret {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                fn avx2($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                #[target_feature(enable = "avx2,avx512f,avx512vl,avx512dq,avx512bw")]
                fn avx512($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                use $crate::lanes::Lanes;
                if lanes >= Lanes::Avx512 && Lanes::Avx512.available() {
                    // SAFETY: the processor has just been found to have every feature the
                    // build enables (the results of the detection are cached: a load).
                    return unsafe { avx512($($arg),*) };
                }
                if lanes >= Lanes::Avx2 && Lanes::Avx2.available() {
                    // SAFETY: as above, for AVX2.
                    return unsafe { avx2($($arg),*) };
                }
            }
            let _ = lanes;
            $body($($arg),*)
        }
    };
}

pub(crate) use lane_builds;

#[cfg(test)]
mod tests {
    use super::*;

    #[inline(always)]
    fn scaled_sum(x: &[f64], k: f64) -> f64 {
        x.iter().map(|v| v * k).sum()
    }

    lane_builds! {
        /// A dispatcher over a small body, for the test.
        fn scaled_sum_in(x: &[f64], k: f64) -> f64 = scaled_sum;
    }

    #[test]
    fn every_build_gives_the_same_bits_and_falls_back_where_missing() {
        let x: Vec<f64> = (0..1000).map(|i| (f64::from(i) * 0.37).sin()).collect();
        let portable = scaled_sum_in(Lanes::Portable, &x, 1.1);
        for lanes in Lanes::ALL {
            // A build the processor lacks runs a narrower one: still the same answer.
            assert_eq!(scaled_sum_in(lanes, &x, 1.1).to_bits(), portable.to_bits());
        }
        assert!(Lanes::Portable.available());
        assert!(Lanes::widest().available());
        assert_eq!(Lanes::widest_up_to(Lanes::Portable), Lanes::Portable);
        assert!(Lanes::widest_up_to(Lanes::Avx2) <= Lanes::Avx2);
        assert_eq!(Lanes::ALL.map(Lanes::name), ["portable", "avx2", "avx512"]);
    }
}
