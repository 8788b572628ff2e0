//! The name map and dataset config TOML (`config/names.toml` and `--dataset-config` files)
//! on arbitrary text: `NameMap::from_toml_str`, `config_from_toml_str` and `parse_rh_phase`.
//!
//! Beyond "no panic": every refusal names the file it came from; an accepted map merged over
//! the built-in map keeps every role's own candidates first; accepted constants lie within
//! the plausible bounds the config documents (R_d 280–295 J kg-1 K-1, g0 9.7–9.9 m s-2,
//! epsilon 0.6–0.65).
#![no_main]

use hypsogrid::ingest::names::{
    config_from_toml_str, parse_rh_phase, NameMap, Role, BUILT_IN_NAMES_TOML,
};
use libfuzzer_sys::fuzz_target;

const ORIGIN: &str = "fuzz.toml";

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    match NameMap::from_toml_str(&text, ORIGIN) {
        Ok(map) => {
            let Ok(base) = NameMap::from_toml_str(BUILT_IN_NAMES_TOML, "names.toml") else {
                panic!("the built-in name map does not parse");
            };
            let merged = map.merged_over(&base);
            for role in Role::ALL {
                let own = map.candidates(role);
                assert!(
                    merged.candidates(role).starts_with(own),
                    "role {} lost its own candidates first",
                    role.key()
                );
                assert_eq!(Role::from_key(role.key()), Some(role));
            }
        }
        Err(e) => assert!(e.to_string().contains(ORIGIN), "{e}"),
    }
    match config_from_toml_str(&text, ORIGIN) {
        Ok(config) => {
            let c = config.constants;
            assert!((280.0..=295.0).contains(&c.dry_air_gas_constant), "{c:?}");
            assert!((9.7..=9.9).contains(&c.standard_gravity), "{c:?}");
            assert!((0.6..=0.65).contains(&c.molar_mass_ratio), "{c:?}");
        }
        Err(e) => assert!(e.to_string().contains(ORIGIN), "{e}"),
    }
    let _ = parse_rh_phase(&text);
});
