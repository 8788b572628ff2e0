//! `hypsogrid serve` as an operator runs it: a child process on 127.0.0.1:0, the client
//! subcommands against it (table and JSON), hot reload of a file renamed into place, settings
//! from flags, environment and file in that order, bearer tokens, JSON logs, and SIGTERM.

use std::path::Path;
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use hypsogrid::compute::{compute_heights, ComputeConfig};
use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME};
use hypsogrid::ingest::{read_cycle, IngestConfig};
use hypsogrid::model::Layer;
use hypsogrid::netcdf_session::NoFileOpen;

mod common;

use common::serve_child::{ServeChild as Server, BIN};

impl Server {
    /// Starts `hypsogrid serve` on the folder `data` on 127.0.0.1:0 with the watcher's
    /// `(settle, poll_interval)` and `extra` arguments, as [`Server::start`] does.
    fn watching(data: &Path, (settle, poll): (&str, &str), extra: &[&str]) -> Server {
        let data = data.to_string_lossy().into_owned();
        let mut args = vec![
            "--data",
            &data,
            "--listen",
            "127.0.0.1:0",
            "--settle",
            settle,
            "--poll-interval",
            poll,
        ];
        args.extend_from_slice(extra);
        Server::start(&args, &[])
    }

    /// Runs a client subcommand against this server.
    fn client(&self, args: &[&str]) -> Output {
        let url = self.url();
        let mut all: Vec<&str> = vec![args[0], "--server", &url];
        all.extend_from_slice(&args[1..]);
        Command::new(BIN)
            .args(&all)
            .output_with_no_file_open()
            .expect("running a client subcommand")
    }

    /// Runs a client subcommand that must succeed, and returns its stdout.
    fn ok(&self, args: &[&str]) -> String {
        let out = self.client(args);
        assert!(
            out.status.success(),
            "{args:?} failed: {}\nserver log:\n{}",
            String::from_utf8_lossy(&out.stderr),
            self.log()
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    }

    /// Waits until `health` says SERVING.
    fn wait_serving(&self) {
        let deadline = Instant::now() + Duration::from_secs(60);
        while Instant::now() < deadline {
            if self.client(&["health"]).status.success() {
                return;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        panic!("the server never became SERVING:\n{}", self.log());
    }
}

fn json(text: &str) -> serde_json::Value {
    serde_json::from_str(text).unwrap_or_else(|e| panic!("not JSON ({e}):\n{text}"))
}

fn catalogue_ids(server: &Server) -> Vec<String> {
    let doc = json(&server.ok(&["catalogue", "--format", "json"]));
    doc["cycles"]
        .as_array()
        .expect("cycles array")
        .iter()
        .map(|c| c["id"].as_str().unwrap_or_default().to_string())
        .collect()
}

/// The batch 1000–500 hPa thickness of the demo cycle at grid point (row, col), lead index t.
fn batch_thickness(path: &Path, t: usize, row: usize, col: usize) -> (f64, f64, f64) {
    let cycle = read_cycle(path, &IngestConfig::default()).expect("reading the demo cycle");
    let config = ComputeConfig {
        layers: vec![Layer {
            bottom_pa: 100000.0,
            top_pa: 50000.0,
        }],
        ..ComputeConfig::default()
    };
    let heights = compute_heights(&cycle, &config, &|_| {}).expect("batch compute");
    let v = f64::from(heights.thickness[0].values[[0, t, row, col]]);
    (cycle.grid.latitudes[row], cycle.grid.longitudes[col], v)
}

#[test]
fn serve_answers_every_client_command_reloads_and_stops_on_sigterm() {
    let dir = tempfile::tempdir().unwrap();
    let demo = write_demo_cycle(dir.path()).unwrap();
    let server = Server::watching(dir.path(), ("200ms", "100ms"), &[]);
    assert!(
        server.address.starts_with("127.0.0.1:"),
        "{}",
        server.address
    );
    server.wait_serving();

    // health: table and JSON.
    let text = server.ok(&["health"]);
    assert!(text.contains("SERVING"), "{text}");
    let doc = json(&server.ok(&["health", "--format", "json"]));
    assert_eq!(doc["status"], "SERVING");

    // catalogue: table and JSON.
    let text = server.ok(&["catalogue"]);
    assert!(text.contains(DEMO_FILE_NAME), "{text}");
    assert!(
        text.contains("2031-01-14T00:00:00Z"),
        "reference time:\n{text}"
    );
    assert!(text.contains("21 isobaric 1000..100 hPa"), "{text}");
    let doc = json(&server.ok(&["catalogue", "--format", "json"]));
    assert_eq!(doc["cycles"][0]["id"], DEMO_FILE_NAME);
    assert_eq!(
        doc["cycles"][0]["lead_times_s"],
        serde_json::json!([0, 21600, 43200, 64800, 86400, 129600, 172800])
    );

    // area: table with the matrix, JSON with the grid, CSV with one line per value.
    let text = server.ok(&[
        "area",
        "--bbox",
        "55,56,-40,-38",
        "--layer",
        "1000:500",
        "--height",
        "500",
        "--lead-time",
        "12h",
        "--stride",
        "2",
    ]);
    assert!(text.contains("lead time +12h"), "{text}");
    assert!(text.contains("3 rows x 5 columns"), "{text}");
    assert!(text.contains("thickness 1000-500 hPa"), "{text}");
    assert!(text.contains("height 500 hPa"), "{text}");
    let doc = json(&server.ok(&[
        "area",
        "--bbox",
        "55,56,-40,-38",
        "--layer",
        "1000:500",
        "--valid-time",
        "2031-01-14T12:00:00Z",
        "--format",
        "json",
    ]));
    assert_eq!(doc["lead_time_s"], 43200, "the valid time resolves to +12h");
    assert_eq!(
        doc["latitudes_deg"],
        serde_json::json!([56.0, 55.75, 55.5, 55.25, 55.0])
    );
    assert_eq!(doc["longitudes_deg"].as_array().unwrap().len(), 9);
    let values = doc["fields"][0]["values"].as_array().unwrap();
    assert_eq!(values.len(), 5);
    assert_eq!(values[0].as_array().unwrap().len(), 9);
    let csv = server.ok(&[
        "area",
        "--bbox",
        "55,56,-40,-38",
        "--stride",
        "2",
        "--format",
        "csv",
    ]);
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(
        lines[0],
        "quantity,latitude_deg,longitude_deg,value_gpm,below_ground,missing"
    );
    assert_eq!(
        lines.len(),
        1 + 15,
        "3 x 5 values of the default 1000-500 hPa layer:\n{csv}"
    );

    // position: a value on a grid point (nearest) equals the batch output there.
    let (lat, lon, batch) = batch_thickness(&demo, 2, 10, 20);
    let point = format!("{lat},{lon}");
    let doc = json(&server.ok(&[
        "position",
        "--point",
        &point,
        "--layer",
        "1000:500",
        "--nearest",
        "--format",
        "json",
    ]));
    let samples = doc["series"][0]["samples"].as_array().unwrap();
    assert_eq!(samples.len(), 7, "every lead time by default");
    let served = samples[2]["values"][0].as_f64().unwrap();
    // Heights near 5600 m are stored as f32 (spacing 0.0005 m): a few roundings apart.
    assert!(
        (served - batch).abs() <= 2e-3,
        "served {served} vs batch {batch} (f32 rounding only)"
    );
    let text = server.ok(&[
        "position",
        "--point",
        "55.4,-42.9",
        "--point",
        "58.65,-29.4",
        "--layer",
        "1000:500,850:700",
        "--lead-time",
        "0h,48h",
    ]);
    assert!(
        text.contains("point 55.4, -42.9") && text.contains("point 58.65, -29.4"),
        "{text}"
    );
    assert!(text.contains("+48h") && !text.contains("+12h"), "{text}");
    assert!(text.contains("thickness 850-700 hPa"), "{text}");
    assert!(
        text.contains('~'),
        "the plateau site is below 1000 hPa ground:\n{text}"
    );

    // profile: table bottom row is 1000 hPa, below the plateau's ground.
    let text = server.ok(&["profile", "--point", "58.65,-29.4", "--lead-time", "6h"]);
    assert!(text.contains("surface:"), "{text}");
    assert!(
        text.contains("yes"),
        "below-ground levels are marked:\n{text}"
    );
    let doc = json(&server.ok(&["profile", "--point", "58.65,-29.4", "--format", "json"]));
    let levels = doc["levels"].as_array().unwrap();
    assert_eq!(levels.len(), 21);
    assert_eq!(levels[0]["pressure_pa"], 100000.0);
    assert_eq!(levels[0]["below_ground"], true);
    assert!(doc["surface_height_m"].as_f64().unwrap() > 1000.0, "{doc}");

    // trajectory: two waypoints inside the cycle's valid times.
    let doc = json(&server.ok(&[
        "trajectory",
        "--waypoint",
        "55,-40,2031-01-14T03:00:00Z",
        "--waypoint",
        "56,-35,2031-01-14T09:00:00Z",
        "--format",
        "json",
    ]));
    assert_eq!(doc["samples"].as_array().unwrap().len(), 2);

    // An error from the server: one line, the code and the field.
    let out = server.client(&["area", "--bbox", "56,55,-40,-38"]);
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("INVALID_ARGUMENT") && err.contains("bbox"),
        "{err}"
    );
    let out = server.client(&["position", "--point", "55,-40", "--lead-time", "7h"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("NOT_FOUND"), "{err}");

    // Hot reload: a copy written as .partial and renamed into place is picked up.
    let partial = dir.path().join("second.nc.partial");
    std::fs::copy(&demo, &partial).unwrap();
    std::thread::sleep(Duration::from_millis(400));
    assert!(
        !catalogue_ids(&server)
            .iter()
            .any(|id| id.contains("second")),
        "a .partial file is never read"
    );
    std::fs::rename(&partial, dir.path().join("second.nc")).unwrap();
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        let ids = catalogue_ids(&server);
        if ids.iter().any(|id| id == "second.nc") {
            assert!(ids.iter().any(|id| id == DEMO_FILE_NAME), "{ids:?}");
            break;
        }
        assert!(
            Instant::now() < deadline,
            "second.nc never appeared: {ids:?}\n{}",
            server.log()
        );
        std::thread::sleep(Duration::from_millis(100));
    }

    let (code, took) = server.terminate();
    assert_eq!(code, Some(0), "exit code after SIGTERM");
    assert!(took < Duration::from_secs(5), "exit took {took:?}");
}

#[test]
fn settings_come_from_flags_then_environment_then_the_file() {
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("cycles");
    std::fs::create_dir(&data).unwrap();
    let config = dir.path().join("server.toml");
    // The file names the data folder (relative to itself) and a listen address.
    std::fs::write(
        &config,
        "[server]\ndata = \"cycles\"\nlisten = \"127.0.0.1:0\"\n\n[watch]\nsettle = \"100ms\"\n",
    )
    .unwrap();
    let config_arg = config.to_string_lossy().into_owned();

    // File only.
    let server = Server::start(&["--config", &config_arg], &[]);
    assert!(
        server.address.starts_with("127.0.0.1:"),
        "{}",
        server.address
    );
    let text = server.ok(&["catalogue"]);
    assert!(text.contains("0 cycle(s) loaded"), "{text}");
    // No cycle yet: health answers NOT_SERVING, and the health command exits 1.
    let out = server.client(&["health"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stdout).contains("NOT_SERVING"));
    assert_eq!(server.terminate().0, Some(0));

    // The environment wins over the file (127.0.0.2 is loopback too on Linux).
    let server = Server::start(
        &["--config", &config_arg],
        &[("HYPSOGRID_LISTEN", "127.0.0.2:0")],
    );
    assert!(
        server.address.starts_with("127.0.0.2:"),
        "{}",
        server.address
    );
    assert_eq!(server.terminate().0, Some(0));

    // A flag wins over the environment.
    let server = Server::start(
        &["--config", &config_arg, "--listen", "127.0.0.3:0"],
        &[("HYPSOGRID_LISTEN", "127.0.0.2:0")],
    );
    assert!(
        server.address.starts_with("127.0.0.3:"),
        "{}",
        server.address
    );
    assert_eq!(server.terminate().0, Some(0));
}

#[test]
fn tokens_guard_the_queries_and_logs_can_be_json() {
    let dir = tempfile::tempdir().unwrap();
    write_demo_cycle(dir.path()).unwrap();
    let tokens = dir.path().join("tokens.txt");
    std::fs::write(&tokens, "# forecast office tools\nsecret-one\nsecret-two\n").unwrap();
    let tokens_arg = tokens.to_string_lossy().into_owned();
    let server = Server::watching(
        dir.path(),
        ("100ms", "100ms"),
        &["--auth-tokens", &tokens_arg, "--log-format", "json"],
    );
    // Health stays open for probes.
    server.wait_serving();
    let out = server.client(&["catalogue"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("UNAUTHENTICATED"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let out = server.client(&["catalogue", "--token", "wrong"]);
    assert!(String::from_utf8_lossy(&out.stderr).contains("UNAUTHENTICATED"));
    let text = server.ok(&["catalogue", "--token", "secret-two"]);
    assert!(text.contains(DEMO_FILE_NAME), "{text}");
    let (code, _) = {
        let log = server.log();
        // The two plain lines for scripts aside, every line is JSON.
        let for_scripts =
            |l: &&str| l.starts_with("listening on ") || l.starts_with("data folder scanned: ");
        for line in log.lines().filter(|l| !for_scripts(l)) {
            let v: serde_json::Value = serde_json::from_str(line)
                .unwrap_or_else(|e| panic!("a log line that is not JSON ({e}): {line}"));
            assert!(v.get("level").is_some(), "{line}");
        }
        server.terminate()
    };
    assert_eq!(code, Some(0));
}

#[test]
fn bad_settings_end_with_one_line_naming_them() {
    let out = Command::new(BIN)
        .args([
            "serve",
            "--data",
            "/no/such/folder",
            "--listen",
            "127.0.0.1:0",
        ])
        .output_with_no_file_open()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("/no/such/folder"), "{err}");
    assert_eq!(err.trim_end().lines().count(), 1, "{err}");

    let out = Command::new(BIN)
        .args(["serve", "--memory-budget", "lots"])
        .output_with_no_file_open()
        .unwrap();
    assert_eq!(out.status.code(), Some(2), "a clap usage error");
    assert!(String::from_utf8_lossy(&out.stderr).contains("lots"));

    // A client with no server to talk to fails with one line naming the URL.
    let out = Command::new(BIN)
        .args([
            "catalogue",
            "--server",
            "http://127.0.0.1:9",
            "--timeout",
            "2s",
        ])
        .output_with_no_file_open()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("127.0.0.1:9"), "{err}");
}

/// Precipitation-type guidance over the whole demo region from a running server, with the
/// request's thresholds if any.
fn guidance_over_grpc(
    server: &Server,
    thresholds: Option<hypsogrid::pb::GuidanceThresholds>,
) -> hypsogrid::pb::GuidanceAreaResponse {
    use hypsogrid::pb;
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    runtime.block_on(async {
        let mut client = pb::product_service_client::ProductServiceClient::connect(server.url())
            .await
            .expect("connecting");
        client
            .get_guidance_area(pb::GuidanceAreaRequest {
                field: Some(pb::FieldSelection {
                    cycle_id: DEMO_FILE_NAME.to_string(),
                    time: Some(pb::TimeSelection {
                        kind: Some(pb::time_selection::Kind::LeadTimeS(24 * 3600)),
                    }),
                    member: 0,
                    quantity: None,
                    allow_extrapolation: false,
                }),
                bbox: Some(pb::BoundingBox::whole_globe()),
                stride: None,
                thresholds,
            })
            .await
            .expect("guidance area")
            .into_inner()
    })
}

/// An office's guidance settings file (named in the server config, relative to it) is what
/// every guidance answer starts from; a request's threshold still replaces the one it names;
/// a bad file stops the server before it serves, naming the file and the key.
#[test]
fn the_offices_guidance_settings_are_what_guidance_answers_start_from() {
    use hypsogrid::pb::GuidanceThresholds;
    let dir = tempfile::tempdir().unwrap();
    write_demo_cycle(dir.path()).unwrap();
    // 5280 m: the critical 1000-500 hPa thickness many European offices use (GUIDE §3,
    // common practice); 1530 m for 850-700 hPa, an office's own choice.
    std::fs::write(
        dir.path().join("guidance.toml"),
        "critical_1000_500_m = 5280.0\ncritical_850_700_m = 1530.0\n",
    )
    .unwrap();
    let config = dir.path().join("server.toml");
    std::fs::write(
        &config,
        "[server]\ndata = \".\"\n\n[products]\nguidance_settings = \"guidance.toml\"\n",
    )
    .unwrap();
    let config_arg = config.to_string_lossy().into_owned();
    let server = Server::start(
        &[
            "--config",
            &config_arg,
            "--listen",
            "127.0.0.1:0",
            "--settle",
            "100ms",
        ],
        &[],
    );
    server.wait_serving();
    let office = guidance_over_grpc(&server, None);
    let used = office.thresholds.expect("thresholds used");
    assert_eq!(used.thickness_1000_500_m, Some(5280.0));
    assert_eq!(used.thickness_850_700_m, Some(1530.0));
    // Not in the file: the built-in 1300 m (GUIDE §3, common practice).
    assert_eq!(used.thickness_1000_850_m, Some(1300.0));
    // The request names one threshold: that one changes, the office's other one stays.
    let asked = guidance_over_grpc(
        &server,
        Some(GuidanceThresholds {
            thickness_1000_500_m: Some(5400.0),
            ..Default::default()
        }),
    );
    let used = asked.thresholds.expect("thresholds used");
    assert_eq!(used.thickness_1000_500_m, Some(5400.0));
    assert_eq!(used.thickness_850_700_m, Some(1530.0));
    // A lower critical line puts more of the region on the rain side.
    let rain = hypsogrid::pb::PrecipitationType::Rain as usize;
    assert!(
        office.category_counts[rain] > asked.category_counts[rain],
        "{:?} vs {:?}",
        office.category_counts,
        asked.category_counts
    );
    let log = server.log();
    assert!(
        log.contains("guidance settings") && log.contains("guidance.toml"),
        "{log}"
    );
    // Every setting in force is in the log, the file's and the built-in ones alike.
    for setting in [
        "critical_1000_500_m=5280.0",
        "critical_850_700_m=1530.0",
        "critical_1000_850_m=1300.0",
        "margin_1000_500_m=30.0",
        "low_ground_max_m=300.0",
        "wet_bulb_zero_rain_min_agl_m=600.0",
    ] {
        assert!(log.contains(setting), "{setting} not in the log:\n{log}");
    }

    // SIGHUP re-reads the file: a changed threshold is in force without a restart (the
    // cycles stay loaded); a broken file is logged and the settings in force stay.
    let used_now = |server: &Server| {
        guidance_over_grpc(server, None)
            .thresholds
            .and_then(|t| t.thickness_1000_500_m)
    };
    std::fs::write(
        dir.path().join("guidance.toml"),
        "critical_1000_500_m = 5340.0\ncritical_850_700_m = 1530.0\n",
    )
    .unwrap();
    server.signal(libc::SIGHUP);
    let deadline = Instant::now() + Duration::from_secs(20);
    while used_now(&server) != Some(5340.0) {
        assert!(
            Instant::now() < deadline,
            "the re-read settings are not in force; server log:\n{}",
            server.log()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    std::fs::write(
        dir.path().join("guidance.toml"),
        "critical_1000_500_m = \"high\"\n",
    )
    .unwrap();
    server.signal(libc::SIGHUP);
    let deadline = Instant::now() + Duration::from_secs(20);
    while !server.log().contains("previous settings stay in force") {
        assert!(
            Instant::now() < deadline,
            "no warning for a broken file; server log:\n{}",
            server.log()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    assert_eq!(used_now(&server), Some(5340.0));
    assert_eq!(server.terminate().0, Some(0));

    // A misspelt key (the TOML parser's message, which shows the line) and a value out of
    // range (one line): the first line names the file, the message the key.
    for (text, key, lines) in [
        ("critical_1000_500 = 5280.0\n", "critical_1000_500", None),
        (
            "critical_1000_500_m = -5.0\n",
            "critical_1000_500_m",
            Some(1),
        ),
    ] {
        let bad = dir.path().join("bad-guidance.toml");
        std::fs::write(&bad, text).unwrap();
        let out = Command::new(BIN)
            .args(["serve", "--listen", "127.0.0.1:0", "--guidance-settings"])
            .arg(&bad)
            .arg("--data")
            .arg(dir.path())
            .output_with_no_file_open()
            .unwrap();
        assert_eq!(out.status.code(), Some(1), "{text}");
        let err = String::from_utf8_lossy(&out.stderr);
        let first = err.lines().next().unwrap_or_default();
        assert!(
            first.contains("bad-guidance.toml") && err.contains(key),
            "{text}: {err}"
        );
        if let Some(n) = lines {
            assert_eq!(err.trim_end().lines().count(), n, "{err}");
        }
    }
}

/// SIGTERM during a long startup scan ends the process in order at once, not after the last
/// file: a service manager's grace period is seconds, a full folder's scan may be minutes.
/// Eight names for one four-step file (hard links, an hour old so that the scan loads them at
/// first sight); SIGTERM once the first is loaded; the scan must not have gone on to the
/// eighth. The server listened before the scan loaded anything, and loaded the names newest
/// first (the same modification time here: the last name first).
#[test]
fn sigterm_during_the_startup_scan_ends_it_without_the_files_left() {
    let dir = tempfile::tempdir().unwrap();
    let first = dir.path().join("cycle-0.nc");
    let spec = hypsogrid::demo::SyntheticGlobal {
        rows: 181,
        cols: 360,
        levels: 31,
        times: 4,
        deflate_level: None,
    };
    hypsogrid::demo::write_synthetic_global(&first, &spec).expect("synthetic cycle");
    let an_hour_ago = std::time::SystemTime::now() - Duration::from_secs(3600);
    std::fs::File::options()
        .write(true)
        .open(&first)
        .unwrap()
        .set_modified(an_hour_ago)
        .unwrap();
    const FILES: usize = 8;
    for i in 1..FILES {
        std::fs::hard_link(&first, dir.path().join(format!("cycle-{i}.nc"))).unwrap();
    }
    let data = dir.path().to_string_lossy().into_owned();
    let server = Server::start_unready(&["--data", &data, "--listen", "127.0.0.1:0"], &[]);
    server.wait_for_log("cycle loaded");
    let log_so_far = server.log();
    let (code, _) = server_terminate_keeping_log(server, |log| {
        assert!(
            log.contains("shutting down during the startup scan"),
            "{log}\n(before SIGTERM:\n{log_so_far})"
        );
        let loaded = log.lines().filter(|l| l.contains("cycle loaded")).count();
        assert!(
            (1..FILES).contains(&loaded),
            "{loaded} files loaded of {FILES}: the scan went on after SIGTERM\n{log}"
        );
        assert!(!log.contains("data folder scanned"), "{log}");
        let position = |text: &str| log.lines().position(|l| l.contains(text));
        let first_load = position("cycle loaded").unwrap();
        assert!(position("listening on").unwrap() < first_load, "{log}");
        let first_loaded = log.lines().nth(first_load).unwrap();
        assert!(first_loaded.contains("cycle-7.nc"), "{first_loaded}");
    });
    assert_eq!(code, Some(0), "exit code after SIGTERM");
}

/// The binary as operators run it, with HDF5's own file locking off (src/main.rs): a cycle
/// whose producer still holds it locked for writing (the exclusive `flock` HDF5 1.10 and
/// later take while they write, taken here as such a producer would) is not read, is logged
/// as locked once however many scans it waits through, and is served once released.
#[test]
fn a_cycle_locked_by_its_writer_is_logged_once_and_served_once_released() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_demo_cycle(dir.path()).unwrap();
    let an_hour_ago = std::time::SystemTime::now() - Duration::from_secs(3600);
    let writer = common::writer_lock::held_as_a_writer(&path);
    writer.set_modified(an_hour_ago).unwrap();
    let server = Server::watching(dir.path(), ("100ms", "50ms"), &[]);
    let locked_lines = |log: &str| {
        log.lines()
            .filter(|l| l.contains("still locked by its writer"))
            .count()
    };
    // About ten more settle times, each ending in another attempt.
    std::thread::sleep(Duration::from_millis(1200));
    let log = server.log();
    assert_eq!(locked_lines(&log), 1, "logged once:\n{log}");
    assert!(log.contains(DEMO_FILE_NAME), "{log}");
    assert!(!log.contains("cycle loaded"), "read while locked:\n{log}");
    assert!(catalogue_ids(&server).is_empty());
    drop(writer);
    server.wait_for_log("cycle loaded");
    assert_eq!(catalogue_ids(&server), [DEMO_FILE_NAME]);
    assert_eq!(locked_lines(&server.log()), 1);
    let (code, _) = server.terminate();
    assert_eq!(code, Some(0));
}

/// Sends SIGTERM, waits for the exit and hands the whole log (read after the exit) to
/// `check`.
fn server_terminate_keeping_log(
    server: Server,
    check: impl FnOnce(&str),
) -> (Option<i32>, Duration) {
    let log = std::sync::Arc::clone(server.stderr_lines());
    let (code, took) = server.terminate();
    // The last lines reach the reading thread shortly after the exit.
    std::thread::sleep(Duration::from_millis(300));
    check(&log.lock().unwrap().join("\n"));
    (code, took)
}
