//! Vertical axes: isobaric level order, CF `formula_terms` of hybrid sigma-pressure
//! coordinates, half levels from bounds, and matching levels by pressure value.
//!
//! Pure functions over strings and slices; the NetCDF side lives in `mod.rs`.

/// CF standard name of a hybrid sigma-pressure coordinate (CF conventions, Appendix D).
pub const HYBRID_SIGMA_PRESSURE: &str = "atmosphere_hybrid_sigma_pressure_coordinate";

/// Parse a CF `formula_terms` attribute, `"ap: hyam b: hybm ps: PS"`, into (term, variable)
/// pairs in the order written.
///
/// # Method
/// CF writes the attribute as blank-separated `term: variable` pairs. A term is a word
/// followed by a colon; the colon may touch the word (`ap:`) or, as some producers write it,
/// stand after a blank (`ap : hyam`). A term without a variable, a variable without a term
/// or a repeated term returns `None`.
///
/// # References
/// CF conventions 1.11, §4.3.3 (parametric vertical coordinate) and Appendix D.
pub fn parse_formula_terms(text: &str) -> Option<Vec<(String, String)>> {
    let tokens: Vec<&str> = text.split_whitespace().collect();
    let mut out: Vec<(String, String)> = Vec::new();
    let mut i = 0;
    while i < tokens.len() {
        let tok = tokens.get(i)?;
        let (term, mut next) = if let Some(t) = tok.strip_suffix(':') {
            (t, i + 1)
        } else if tokens.get(i + 1) == Some(&":") {
            (*tok, i + 2)
        } else if let Some((t, v)) = tok.split_once(':') {
            // `ap:hyam` with no blank.
            if t.is_empty() || v.is_empty() {
                return None;
            }
            if out.iter().any(|(k, _)| k == t) {
                return None;
            }
            out.push((t.to_string(), v.to_string()));
            i += 1;
            continue;
        } else {
            return None;
        };
        if term.is_empty() || term.contains(':') {
            return None;
        }
        let var = tokens.get(next)?;
        if var.ends_with(':') || var.is_empty() {
            return None;
        }
        next += 1;
        if out.iter().any(|(k, _)| k == term) {
            return None;
        }
        out.push((term.to_string(), (*var).to_string()));
        i = next;
    }
    if out.is_empty() {
        None
    } else {
        Some(out)
    }
}

/// The two CF forms of the hybrid sigma-pressure formula.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum HybridTerms {
    /// `p(k) = ap(k) + b(k) ps`: `ap` in pressure units.
    Ap {
        /// Variable holding ap.
        ap: String,
        /// Variable holding b.
        b: String,
        /// Variable holding the surface pressure.
        ps: String,
    },
    /// `p(k) = a(k) p0 + b(k) ps`: `a` dimensionless, `p0` a reference pressure.
    AP0 {
        /// Variable holding a.
        a: String,
        /// Variable holding b.
        b: String,
        /// Variable holding p0.
        p0: String,
        /// Variable holding the surface pressure.
        ps: String,
    },
}

impl HybridTerms {
    /// Recognise one of the two forms from parsed formula terms.
    pub fn from_terms(terms: &[(String, String)]) -> Option<HybridTerms> {
        let get = |k: &str| terms.iter().find(|(t, _)| t == k).map(|(_, v)| v.clone());
        let b = get("b")?;
        let ps = get("ps")?;
        match (get("ap"), get("a"), get("p0")) {
            (Some(ap), None, _) => Some(HybridTerms::Ap { ap, b, ps }),
            (None, Some(a), Some(p0)) => Some(HybridTerms::AP0 { a, b, p0, ps }),
            _ => None,
        }
    }

    /// The surface-pressure variable.
    pub fn ps(&self) -> &str {
        match self {
            HybridTerms::Ap { ps, .. } | HybridTerms::AP0 { ps, .. } => ps,
        }
    }
}

/// Direction of a strictly monotonic sequence.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Order {
    /// Strictly increasing with index.
    Increasing,
    /// Strictly decreasing with index.
    Decreasing,
}

/// The direction of `values`, or `Err(index)` with the first index `i` where
/// `values[i]` breaks strict monotonicity (or is not finite). One value counts as decreasing
/// (a single level is bottom-up by convention).
pub fn monotonic_order(values: &[f64]) -> Result<Order, usize> {
    if let Some(i) = values.iter().position(|v| !v.is_finite()) {
        return Err(i);
    }
    let (Some(first), Some(second)) = (values.first(), values.get(1)) else {
        return if values.is_empty() {
            Err(0)
        } else {
            Ok(Order::Decreasing)
        };
    };
    let order = if second > first {
        Order::Increasing
    } else if second < first {
        Order::Decreasing
    } else {
        return Err(1);
    };
    for (i, w) in values.windows(2).enumerate() {
        if let [a, b] = w {
            let ok = match order {
                Order::Increasing => b > a,
                Order::Decreasing => b < a,
            };
            if !ok {
                return Err(i + 1);
            }
        }
    }
    Ok(order)
}

/// Half-level values (bottom-up, `n + 1` of them) from CF bounds `[n][2]` of `n` full levels
/// that are already bottom-up, using `key` (for example the pressure at a reference surface
/// pressure) to tell which bound is the lower one.
///
/// Returns `Err(k)` for the first level `k` whose lower bound does not meet the upper bound
/// of level `k - 1` (relative tolerance 1e-6 in `key`).
pub fn half_levels_from_bounds(
    bounds: &[[f64; 2]],
    key: impl Fn(usize, usize) -> f64,
) -> Result<Vec<usize>, usize> {
    // Returns, for each half level, the (level, column) of the bound that defines it, as a
    // flat index `level * 2 + column`, so that the caller can pick a and b from the same spot.
    let mut picks = Vec::with_capacity(bounds.len() + 1);
    let mut prev_top: Option<(usize, f64)> = None;
    for k in 0..bounds.len() {
        let (k0, k1) = (key(k, 0), key(k, 1));
        // The lower bound has the higher pressure.
        let (lower_col, upper_col) = if k0 >= k1 { (0, 1) } else { (1, 0) };
        let lower = if lower_col == 0 { k0 } else { k1 };
        let upper = if upper_col == 0 { k0 } else { k1 };
        match prev_top {
            None => picks.push(k * 2 + lower_col),
            Some((_, top)) => {
                let scale = top.abs().max(lower.abs()).max(1.0);
                if (top - lower).abs() > 1e-6 * scale {
                    return Err(k);
                }
            }
        }
        picks.push(k * 2 + upper_col);
        prev_top = Some((k, upper));
    }
    Ok(picks)
}

/// For each target pressure (Pa), the index of the source level at the same pressure
/// (relative tolerance 1e-5, which separates any two levels a producer would write), or
/// `None` when the source lacks that level.
pub fn match_levels_by_pressure(target_pa: &[f64], source_pa: &[f64]) -> Vec<Option<usize>> {
    target_pa
        .iter()
        .map(|&p| {
            source_pa
                .iter()
                .position(|&s| (s - p).abs() <= 1e-5 * p.abs().max(1.0))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pairs(v: &[(&str, &str)]) -> Vec<(String, String)> {
        v.iter()
            .map(|(a, b)| (a.to_string(), b.to_string()))
            .collect()
    }

    #[test]
    fn formula_terms_forms() {
        // The two forms written in CF Appendix D for atmosphere_hybrid_sigma_pressure_coordinate.
        assert_eq!(
            parse_formula_terms("ap: hyam b: hybm ps: PS"),
            Some(pairs(&[("ap", "hyam"), ("b", "hybm"), ("ps", "PS")]))
        );
        assert_eq!(
            parse_formula_terms("a: hyam b: hybm p0: P0 ps: PS"),
            Some(pairs(&[
                ("a", "hyam"),
                ("b", "hybm"),
                ("p0", "P0"),
                ("ps", "PS")
            ]))
        );
        assert_eq!(
            parse_formula_terms("  ap : ap_bnds\tb:b_bnds   ps: ps "),
            Some(pairs(&[("ap", "ap_bnds"), ("b", "b_bnds"), ("ps", "ps")]))
        );
        for bad in [
            "",
            "ap:",
            "ap: b: x",
            "hyam",
            "ap: x ap: y",
            ": x",
            "ap: x b",
        ] {
            assert_eq!(parse_formula_terms(bad), None, "{bad:?}");
        }
    }

    #[test]
    fn hybrid_forms_recognised() {
        let t = parse_formula_terms("ap: hyam b: hybm ps: PS").unwrap_or_default();
        assert_eq!(
            HybridTerms::from_terms(&t),
            Some(HybridTerms::Ap {
                ap: "hyam".into(),
                b: "hybm".into(),
                ps: "PS".into()
            })
        );
        let t = parse_formula_terms("a: a b: b p0: P0 ps: PS").unwrap_or_default();
        assert!(matches!(
            HybridTerms::from_terms(&t),
            Some(HybridTerms::AP0 { .. })
        ));
        assert_eq!(
            HybridTerms::from_terms(&t).map(|h| h.ps().to_string()),
            Some("PS".into())
        );
        // a without p0, or no ps: not a usable form.
        let t = parse_formula_terms("a: a b: b ps: PS").unwrap_or_default();
        assert_eq!(HybridTerms::from_terms(&t), None);
        let t = parse_formula_terms("ap: a b: b").unwrap_or_default();
        assert_eq!(HybridTerms::from_terms(&t), None);
    }

    #[test]
    fn monotonic_orders() {
        assert_eq!(
            monotonic_order(&[1000.0, 850.0, 500.0]),
            Ok(Order::Decreasing)
        );
        assert_eq!(monotonic_order(&[10.0, 20.0, 30.0]), Ok(Order::Increasing));
        assert_eq!(monotonic_order(&[500.0]), Ok(Order::Decreasing));
        assert_eq!(monotonic_order(&[]), Err(0));
        assert_eq!(monotonic_order(&[1000.0, 850.0, 900.0, 500.0]), Err(2));
        assert_eq!(monotonic_order(&[1000.0, 1000.0]), Err(1));
        assert_eq!(monotonic_order(&[1000.0, f64::NAN]), Err(1));
    }

    #[test]
    fn half_levels_from_contiguous_bounds_in_either_column_order() {
        // Pressures of three layers, bottom-up; bounds written (lower, upper) and (upper, lower).
        let a = [[1000.0, 900.0], [900.0, 700.0], [700.0, 500.0]];
        let picks = half_levels_from_bounds(&a, |k, c| a[k][c]).unwrap_or_default();
        let halves: Vec<f64> = picks.iter().map(|&i| a[i / 2][i % 2]).collect();
        assert_eq!(halves, vec![1000.0, 900.0, 700.0, 500.0]);
        let b = [[900.0, 1000.0], [700.0, 900.0], [500.0, 700.0]];
        let picks = half_levels_from_bounds(&b, |k, c| b[k][c]).unwrap_or_default();
        let halves: Vec<f64> = picks.iter().map(|&i| b[i / 2][i % 2]).collect();
        assert_eq!(halves, vec![1000.0, 900.0, 700.0, 500.0]);
        let gap = [[1000.0, 900.0], [880.0, 700.0]];
        assert_eq!(half_levels_from_bounds(&gap, |k, c| gap[k][c]), Err(1));
    }

    #[test]
    fn levels_match_by_pressure_value() {
        // The GFS 2.5-degree file: RH lacks 20 hPa (PROVENANCE.md).
        let t = [100000.0, 50000.0, 3000.0, 2000.0, 1000.0];
        let h = [100000.0, 50000.0, 3000.0, 1000.0];
        assert_eq!(
            match_levels_by_pressure(&t, &h),
            vec![Some(0), Some(1), Some(2), None, Some(3)]
        );
        // hPa values stored as f32 and scaled to Pa still match.
        let h32 = [925.0_f32 as f64 * 100.0];
        assert_eq!(match_levels_by_pressure(&[92500.0], &h32), vec![Some(0)]);
    }

    proptest::proptest! {
        #[test]
        fn formula_terms_parser_never_panics(text in "\\PC{0,60}") {
            if let Some(pairs) = parse_formula_terms(&text) {
                for (t, v) in &pairs {
                    proptest::prop_assert!(!t.is_empty() && !v.is_empty());
                }
            }
        }

        // Reversing a strictly monotonic sequence reverses its order; sorting any finite
        // distinct set makes it monotonic.
        #[test]
        fn reversal_flips_order(mut v in proptest::collection::vec(1.0f64..110_000.0, 2..30)) {
            v.sort_by(|a, b| b.total_cmp(a));
            v.dedup();
            if v.len() >= 2 {
                proptest::prop_assert_eq!(monotonic_order(&v), Ok(Order::Decreasing));
                v.reverse();
                proptest::prop_assert_eq!(monotonic_order(&v), Ok(Order::Increasing));
            }
        }
    }
}
