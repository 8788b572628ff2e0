//! The `hypsogrid` binary as a user runs it: the demo, `compute` on good and bad files.

use std::path::Path;
use std::process::{Command, Output};

use hypsogrid::demo::write_demo_cycle;
use hypsogrid::netcdf_session::NoFileOpen;

mod common;

fn hypsogrid(args: &[&std::ffi::OsStr]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_hypsogrid"))
        .args(args)
        .output_with_no_file_open()
        .expect("running the hypsogrid binary")
}

fn os(s: &str) -> &std::ffi::OsStr {
    s.as_ref()
}

fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).into_owned()
}

fn files_in(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .expect("listing")
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
}

#[test]
fn demo_prints_the_thickness_table_and_the_caution() {
    let dir = tempfile::tempdir().unwrap();
    let out = hypsogrid(&[os("demo"), os("--keep"), dir.path().as_os_str()]);
    assert!(out.status.success(), "demo failed: {}", stderr(&out));
    let text = String::from_utf8_lossy(&out.stdout);
    for site in hypsogrid::demo::demo_sites() {
        assert!(
            text.contains(site.name),
            "site {} in the table:\n{text}",
            site.name
        );
    }
    assert!(
        text.contains("+48h"),
        "every lead time is a column:\n{text}"
    );
    assert!(text.contains("invented scenario"));
    assert!(
        text.contains("not a forecast or warning"),
        "the caution is printed"
    );
    // The scenario promises that the critical line crosses the region: some sites are on
    // the cold side at some lead time, and some are not.
    assert!(text.contains('*'), "some values below 5400 m:\n{text}");
    // The products: a chart, the guidance chart and an isoline file, written where asked,
    // and the guidance table with its caution.
    let names = files_in(dir.path());
    for name in [
        "thickness_1000_500_24h.png",
        "precipitation_type_24h.png",
        "thickness_1000_500_24h.geojson",
        "hypsogrid_demo_ensemble.nc",
    ] {
        assert!(names.iter().any(|n| n == name), "{name} in {names:?}");
    }
    let png = std::fs::read(dir.path().join("precipitation_type_24h.png")).unwrap();
    assert_eq!(
        &png[..8],
        b"\x89PNG\r\n\x1a\n",
        "a PNG file (ISO/IEC 15948 signature)"
    );
    let geojson: serde_json::Value = serde_json::from_slice(
        &std::fs::read(dir.path().join("thickness_1000_500_24h.geojson")).unwrap(),
    )
    .unwrap();
    assert_eq!(geojson["type"], "FeatureCollection");
    assert!(!geojson["features"].as_array().unwrap().is_empty());
    assert!(text.contains("Precipitation-type guidance"), "{text}");
    assert!(text.contains("P(< 5400 m)"), "the ensemble table:\n{text}");
    assert!(
        text.contains("licensed forecasters decide"),
        "the guidance caution:\n{text}"
    );
}

#[test]
fn compute_writes_heights_and_the_requested_layers() {
    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let output = dir.path().join("out.nc");
    let out = hypsogrid(&[
        os("compute"),
        input.as_os_str(),
        os("--output"),
        output.as_os_str(),
        os("--layers"),
        os("1000:500,925:712.5"),
    ]);
    assert!(out.status.success(), "compute failed: {}", stderr(&out));
    let file = netcdf::open(&output).unwrap();
    for name in [
        "geopotential_height",
        "below_ground",
        "thickness_1000_500",
        "thickness_925_712p5",
    ] {
        assert!(
            file.variable(name).is_some(),
            "variable {name} in the output"
        );
    }
    let history = file.attribute("history").expect("history attribute");
    let history: String = history.value().unwrap().try_into().unwrap();
    assert!(history.contains("compute"), "{history}");
}

/// `--heights-only`: the heights and flags of the default run, value for value, and no
/// thickness; asking for layers as well is refused before anything is read.
#[test]
fn compute_heights_only_writes_the_same_heights_and_no_thickness() {
    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let (full, only) = (dir.path().join("full.nc"), dir.path().join("only.nc"));
    for (output, extra) in [(&full, None), (&only, Some("--heights-only"))] {
        let mut args = vec![
            os("compute"),
            input.as_os_str(),
            os("--output"),
            output.as_os_str(),
        ];
        args.extend(extra.map(os));
        let out = hypsogrid(&args);
        assert!(
            out.status.success(),
            "compute {extra:?} failed: {}",
            stderr(&out)
        );
    }
    let (a, b) = (netcdf::open(&full).unwrap(), netcdf::open(&only).unwrap());
    let names = |f: &netcdf::File| -> Vec<String> { f.variables().map(|v| v.name()).collect() };
    assert!(names(&a).iter().any(|n| n.starts_with("thickness_")));
    assert!(
        !names(&b).iter().any(|n| n.starts_with("thickness_")),
        "{:?}",
        names(&b)
    );
    let z = |f: &netcdf::File| {
        f.variable("geopotential_height")
            .unwrap()
            .get_values::<f32, _>(..)
            .unwrap()
    };
    let flags = |f: &netcdf::File| {
        f.variable("below_ground")
            .unwrap()
            .get_values::<i8, _>(..)
            .unwrap()
    };
    let (za, zb) = (z(&a), z(&b));
    assert_eq!(za.len(), zb.len());
    assert!(
        za.iter().zip(&zb).all(|(x, y)| x.to_bits() == y.to_bits()),
        "heights differ"
    );
    assert_eq!(flags(&a), flags(&b));

    let out = hypsogrid(&[
        os("compute"),
        input.as_os_str(),
        os("--output"),
        dir.path().join("both.nc").as_os_str(),
        os("--heights-only"),
        os("--layers"),
        os("1000:500"),
    ]);
    assert_eq!(out.status.code(), Some(2), "{}", stderr(&out));
    assert!(stderr(&out).contains("--layers"), "{}", stderr(&out));
    assert!(!dir.path().join("both.nc").exists());
}

#[test]
fn compute_on_a_file_that_is_not_netcdf_fails_with_one_line_and_leaves_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("cycle.nc");
    std::fs::write(&input, "this is not a NetCDF file\n").unwrap();
    let output = dir.path().join("out.nc");
    let out = hypsogrid(&[
        os("compute"),
        input.as_os_str(),
        os("--output"),
        output.as_os_str(),
    ]);
    assert_eq!(out.status.code(), Some(1));
    let err = stderr(&out);
    assert_eq!(err.trim_end().lines().count(), 1, "one line: {err}");
    assert!(err.contains("cycle.nc"), "names the file: {err}");
    assert!(!err.contains("panicked"), "{err}");
    assert_eq!(
        files_in(dir.path()),
        vec!["cycle.nc".to_string()],
        "no output left behind"
    );
}

/// The binary turns HDF5's own file locking off (src/main.rs), so the library no longer
/// refuses a file that its producer still holds open for writing: the binary must ask for
/// the writer's lock itself. HDF5 1.10 and later hold an exclusive `flock` on a NetCDF-4
/// file while they write it (taken here as such a writer would); the file is refused, named,
/// with the lock as the reason and no output left, and read once the lock is released.
#[test]
fn compute_refuses_a_file_its_writer_still_holds_locked_and_reads_it_once_released() {
    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let output = dir.path().join("out.nc");
    let args = [
        os("compute"),
        input.as_os_str(),
        os("--output"),
        output.as_os_str(),
    ];
    let writer = common::writer_lock::held_as_a_writer(&input);
    let out = hypsogrid(&args);
    let err = stderr(&out);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains(&input.display().to_string()) && err.contains("locked"),
        "names the file and the lock: {err}"
    );
    assert!(
        !output.exists(),
        "no output while the writer holds the file"
    );
    drop(writer);
    let out = hypsogrid(&args);
    assert!(out.status.success(), "{}", stderr(&out));
    assert!(output.exists());
}

#[test]
fn compute_into_a_missing_folder_fails_naming_it() {
    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let output = dir.path().join("no/such/folder/out.nc");
    let out = hypsogrid(&[
        os("compute"),
        input.as_os_str(),
        os("--output"),
        output.as_os_str(),
    ]);
    assert_eq!(out.status.code(), Some(1));
    assert!(stderr(&out).contains("out.nc"), "{}", stderr(&out));
}

#[test]
fn compute_rejects_an_inverted_layer_before_reading_anything() {
    let out = hypsogrid(&[
        os("compute"),
        os("whatever.nc"),
        os("--output"),
        os("x.nc"),
        os("--layers"),
        os("500:1000"),
    ]);
    assert!(!out.status.success());
    assert!(stderr(&out).contains("500:1000"), "{}", stderr(&out));
}

/// `guidance --box`: a box over the whole domain counts what the whole grid counts; a box
/// around one grid point holds that point, with the category `--point` gives there; a box
/// with points, or upside down, is refused.
#[test]
fn guidance_over_a_box_counts_the_points_inside_it() {
    let dir = tempfile::tempdir().unwrap();
    let input = write_demo_cycle(dir.path()).unwrap();
    let json_of = |extra: &[&str]| -> serde_json::Value {
        let mut args = vec![os("guidance"), input.as_os_str(), os("--time"), os("24h")];
        args.extend(extra.iter().map(|a| os(a)));
        args.extend([os("--format"), os("json")]);
        let out = hypsogrid(&args);
        assert!(out.status.success(), "{extra:?}: {}", stderr(&out));
        serde_json::from_slice(&out.stdout).expect("JSON")
    };
    let whole = json_of(&[]);
    let boxed = json_of(&["--box", "-90,90,-180,180"]);
    assert_eq!(whole["categories"], boxed["categories"]);
    assert_eq!(whole["points"], boxed["points"]);
    assert_eq!(boxed["box"]["south_deg"], -90.0);

    // One grid point of the file (its own coordinates, read with the NetCDF library).
    let file = netcdf::open(&input).unwrap();
    let axis = |name: &str| -> Vec<f64> {
        file.variable(name)
            .unwrap_or_else(|| panic!("{name} in the demo file"))
            .get_values::<f64, _>(..)
            .unwrap()
    };
    let (lats, lons) = (axis("lat"), axis("lon"));
    let (lat, lon) = (lats[lats.len() / 3], lons[lons.len() / 2]);
    let one = json_of(&[
        "--box",
        &format!(
            "{},{},{},{}",
            lat - 0.01,
            lat + 0.01,
            lon - 0.01,
            lon + 0.01
        ),
    ]);
    assert_eq!(one["points"], 1, "{one}");
    let at = json_of(&["--point", &format!("{lat},{lon}")]);
    let category = at["points"][0]["category"].as_str().expect("category");
    assert_eq!(one["categories"][category], 1, "{one}\n{at}");

    let both = hypsogrid(&[
        os("guidance"),
        input.as_os_str(),
        os("--box"),
        os("-90,90,-180,180"),
        os("--point"),
        os("55,-40"),
    ]);
    assert_eq!(both.status.code(), Some(2), "{}", stderr(&both));
    let upside = hypsogrid(&[
        os("guidance"),
        input.as_os_str(),
        os("--box"),
        os("60,50,-45,-25"),
    ]);
    assert_eq!(upside.status.code(), Some(1));
    assert!(stderr(&upside).contains("--box"), "{}", stderr(&upside));
}
