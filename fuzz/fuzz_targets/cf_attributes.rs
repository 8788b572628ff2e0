//! CF attributes as files carry them: `formula_terms` of hybrid coordinates and time units
//! (`UNITS since DATE`), plus the RFC 3339 dates they contain, on arbitrary text.
//!
//! Beyond "no panic": parsed formula terms written back in CF form parse to the same pairs;
//! a parsed time unit puts value 0 at its reference date; a parsed date formats to RFC 3339
//! and parses back to the same instant; the civil-date arithmetic round-trips.
#![no_main]

use hypsogrid::ingest::time::{
    civil_from_days, days_from_civil, format_rfc3339_utc, parse_date_time, parse_time_units,
};
use hypsogrid::ingest::vertical::{parse_formula_terms, HybridTerms};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);

    if let Some(terms) = parse_formula_terms(&text) {
        assert!(!terms.is_empty());
        let written: Vec<String> = terms.iter().map(|(t, v)| format!("{t}: {v}")).collect();
        let again = parse_formula_terms(&written.join(" "));
        assert_eq!(
            again.as_ref(),
            Some(&terms),
            "formula_terms {text:?} written back"
        );
        if let Some(h) = HybridTerms::from_terms(&terms) {
            let ps = h.ps();
            assert!(
                terms.iter().any(|(_, v)| v == ps),
                "ps '{ps}' not among {terms:?}"
            );
        }
    }

    if let Ok(units) = parse_time_units(&text) {
        assert!(units.seconds_per_unit > 0.0 && units.seconds_per_unit.is_finite());
        assert_eq!(units.instant(0.0), Some(units.epoch_seconds), "{text:?}");
        for v in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 1e300] {
            assert_eq!(units.instant(v), None, "{text:?} at {v}");
        }
    }

    if let Some(t) = parse_date_time(&text) {
        let formatted = format_rfc3339_utc(t);
        assert_eq!(
            parse_date_time(&formatted),
            Some(t),
            "{text:?} -> {formatted}"
        );
    }

    // Calendar arithmetic on the bytes as numbers (years within ±1 000 000).
    if data.len() >= 8 {
        let raw = i64::from_le_bytes(data[..8].try_into().unwrap_or([0; 8]));
        let days = raw % 365_000_000;
        let (y, m, d) = civil_from_days(days);
        assert!(
            (1..=12).contains(&m) && (1..=31).contains(&d),
            "{days} -> {y}-{m}-{d}"
        );
        assert_eq!(days_from_civil(y, m, d), days);
    }
});
