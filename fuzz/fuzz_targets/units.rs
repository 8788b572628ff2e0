//! Units strings as files carry them: every parser of `hypsogrid::ingest::units` on
//! arbitrary text. Beyond "no panic", checks that normalising is idempotent, that a parser
//! answers the same for a string and its normal form, and that every accepted conversion
//! maps finite values to finite values.
#![no_main]

use hypsogrid::ingest::units::{
    normalise_units, parse_height_units, parse_mass_ratio_units, parse_pressure_units,
    parse_relative_humidity_units, parse_temperature_units, Linear, Quantity,
};
use libfuzzer_sys::fuzz_target;

/// Standard gravity, m s-2 (WMO definition of the geopotential metre).
const G0: f64 = 9.80665;

fn finite_map(l: Linear, text: &str) {
    for v in [0.0, 1.0, -40.0, 101_325.0] {
        assert!(
            l.apply(v).is_finite(),
            "{text:?}: {l:?} maps {v} to a non-finite value"
        );
    }
}

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    let normal = normalise_units(&text);
    assert_eq!(
        normalise_units(&normal),
        normal,
        "normalising {text:?} twice"
    );
    let parsers: [(&str, fn(&str) -> Option<Linear>); 4] = [
        ("temperature", parse_temperature_units),
        ("pressure", parse_pressure_units),
        ("mass ratio", parse_mass_ratio_units),
        ("relative humidity", parse_relative_humidity_units),
    ];
    for (what, parse) in parsers {
        let raw = parse(&text);
        assert_eq!(
            raw,
            parse(&normal),
            "{what} units {text:?} vs its normal form {normal:?}"
        );
        if let Some(l) = raw {
            finite_map(l, &text);
        }
    }
    assert_eq!(parse_height_units(&text), parse_height_units(&normal));
    for q in [
        Quantity::Temperature,
        Quantity::Pressure,
        Quantity::MassRatio,
        Quantity::RelativeHumidity,
        Quantity::Height,
    ] {
        if let Some(l) = q.parse(&text, G0) {
            finite_map(l, &text);
        }
        assert!(!q.accepted().is_empty());
    }
});
