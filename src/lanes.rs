//! Which SIMD build of an inner loop runs: the target's baseline instruction set, or on
//! x86-64 the same code compiled with AVX2 or with AVX-512, chosen once from what the
//! processor has.
//!
//! The loops that use this ([`crate::kernel`]'s level and surface steps, the decoding pass of
//! [`crate::ingest`]) are written without a branch on the data, so that the compiler turns
//! them into SIMD lanes of whatever width the build allows; `lane_builds!` compiles one
//! such body three times and dispatches on a [`Lanes`]. Every build does the same IEEE
//! operations in the same order, so all three give the same bits; `tests/kernel.rs` checks
//! that on the builds this processor has.
//!
//! A multiply-add is fused only where a body asks for it (`f64::mul_add`), and then in every
//! build: the AVX2 and AVX-512 builds require the processor's FMA instructions, and the
//! baseline build is compiled a second time with them (and with AVX, which FMA needs: four
//! `f64` lanes), which runs wherever the processor has them ([`fused_multiply_add`]). Only
//! a processor without FMA (x86-64 processors from before about 2013, and some low-end
//! ones since) runs the plain baseline build, where each `mul_add` is a call to a software
//! `fma` routine: correctly rounded like the instruction, so the same bits, but several
//! times slower (the kernel at 0.25° took 341 ms that way here, against 34 ms).

/// A build of the inner loops, narrowest first.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Lanes {
    /// The target's baseline instruction set (SSE2 on x86-64: two `f64` lanes), with AVX and
    /// FMA where the processor has them ([`fused_multiply_add`]).
    Portable,
    /// AVX2 with FMA: four `f64` or eight `f32` lanes.
    Avx2,
    /// AVX-512 (F, VL, DQ and BW): eight `f64` or sixteen `f32` lanes.
    Avx512,
}

impl Lanes {
    /// Every build, narrowest first.
    pub const ALL: [Lanes; 3] = [Lanes::Portable, Lanes::Avx2, Lanes::Avx512];

    /// Whether this processor runs the build (found once, then a load: the dispatch of
    /// `lane_builds!` asks on every call, which the area answers make once per row).
    pub fn available(self) -> bool {
        self <= detected().0
    }

    /// Whether this processor runs the build, asked of the processor (the detection's own
    /// results are cached too, but each is a load and a test, seven for AVX-512).
    fn detect(self) -> bool {
        match self {
            Lanes::Portable => true,
            #[cfg(target_arch = "x86_64")]
            Lanes::Avx2 => std::is_x86_feature_detected!("avx2") && detect_fused_multiply_add(),
            #[cfg(target_arch = "x86_64")]
            Lanes::Avx512 => {
                Lanes::Avx2.detect()
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
        // Each build needs what the narrower ones need, so the builds this processor runs
        // are those up to the widest.
        limit.min(detected().0)
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

/// Whether the processor has fused multiply-add instructions: on x86-64 FMA3, which comes
/// with AVX and needs it (the baseline build's second compilation enables both); on other
/// targets `true`, where `f64::mul_add` compiles to the target's own instruction or call.
pub fn fused_multiply_add() -> bool {
    detected().1
}

/// The widest build the processor runs and whether it has FMA, asked of it once.
fn detected() -> &'static (Lanes, bool) {
    static DETECTED: std::sync::OnceLock<(Lanes, bool)> = std::sync::OnceLock::new();
    DETECTED.get_or_init(|| {
        let widest = Lanes::ALL
            .into_iter()
            .rev()
            .find(|l| l.detect())
            .unwrap_or(Lanes::Portable);
        (widest, detect_fused_multiply_add())
    })
}

/// [`fused_multiply_add`], asked of the processor.
fn detect_fused_multiply_add() -> bool {
    #[cfg(target_arch = "x86_64")]
    return std::is_x86_feature_detected!("avx") && std::is_x86_feature_detected!("fma");
    #[cfg(not(target_arch = "x86_64"))]
    true
}

/// Defines `fn $name(lanes: Lanes, args…) -> R` that runs `$body(args…)` compiled for the
/// build `lanes` names: the baseline instruction set (with FMA where the processor has it),
/// AVX2 or AVX-512, the last two with FMA. A build the processor lacks falls back to the
/// next narrower one, so any `Lanes` is safe to pass.
///
/// `$body` must be `#[inline(always)]`, so that each build compiles its own copy of it.
macro_rules! lane_builds {
    ($(#[$doc:meta])* fn $name:ident($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty = $body:path;) => {
        $(#[$doc])*
        #[inline]
        fn $name(lanes: $crate::lanes::Lanes, $($arg: $ty),*) -> $ret {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx,fma")]
                fn baseline_fma($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                #[target_feature(enable = "avx2,fma")]
                fn avx2($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                #[target_feature(enable = "avx2,fma,avx512f,avx512vl,avx512dq,avx512bw")]
                fn avx512($($arg: $ty),*) -> $ret {
                    $body($($arg),*)
                }
                use $crate::lanes::Lanes;
                // The build asked for, or the widest narrower one the processor runs (found
                // once: a load).
                match Lanes::widest_up_to(lanes) {
                    // SAFETY: the processor has every feature the build enables.
                    Lanes::Avx512 => return unsafe { avx512($($arg),*) },
                    // SAFETY: as above, for AVX2.
                    Lanes::Avx2 => return unsafe { avx2($($arg),*) },
                    // SAFETY: as above, for AVX and FMA.
                    Lanes::Portable if $crate::lanes::fused_multiply_add() => {
                        return unsafe { baseline_fma($($arg),*) }
                    }
                    Lanes::Portable => {}
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

    /// Products of neighbours added with fused multiply-adds, in lanes.
    #[inline(always)]
    fn fused_products(x: &[f64], out: &mut [f64]) {
        for (o, w) in out.iter_mut().zip(x.windows(2)) {
            *o = w[0].mul_add(w[1], *o);
        }
    }

    lane_builds! {
        /// A dispatcher over a body with fused multiply-adds, for the test.
        fn fused_products_in(x: &[f64], out: &mut [f64]) -> () = fused_products;
    }

    #[test]
    fn a_fused_multiply_add_gives_the_same_bits_in_every_build() {
        // Values whose products are not exact in `f64`, so that fusing shows in the bits.
        let x: Vec<f64> = (0..1001)
            .map(|i| (f64::from(i) * 0.37).sin() * 1e3)
            .collect();
        let start: Vec<f64> = (0..1000).map(|i| (f64::from(i) * 0.11).cos()).collect();
        // The body called directly, compiled for the baseline: `mul_add` is a call to the
        // software `fma` routine there.
        let mut library = start.clone();
        fused_products(&x, &mut library);
        let unfused: Vec<f64> = (0..1000).map(|i| x[i] * x[i + 1] + start[i]).collect();
        let differ = library.iter().zip(&unfused).filter(|(a, b)| a != b).count();
        assert!(
            differ > 100,
            "only {differ} of 1000 sums show the fused rounding"
        );
        for lanes in Lanes::ALL {
            let mut out = start.clone();
            fused_products_in(lanes, &x, &mut out);
            let same = out
                .iter()
                .zip(&library)
                .all(|(a, b)| a.to_bits() == b.to_bits());
            assert!(same, "{} build", lanes.name());
        }
        #[cfg(target_arch = "x86_64")]
        if Lanes::Avx2.available() {
            assert!(fused_multiply_add());
        }
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
