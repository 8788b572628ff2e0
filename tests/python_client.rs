//! The example Python client (examples/python/client.py, grpcio with stubs generated from
//! the protos at run time) against the real server binary on 127.0.0.1:0 with the demo
//! cycle, and grpcio-reflection (v1alpha) discovering the API without any stubs.
//!
//! Needs python3 with grpcio, grpcio-tools, grpcio-health-checking and grpcio-reflection:
//! `scripts/install-deps` puts them in target/python-venv, which this test uses first
//! (HYPSOGRID_PYTHON overrides). CI runs install-deps, so CI always has them; without them
//! the test fails and says so.

use std::io::{BufRead, BufReader};
use std::path::PathBuf;
use std::process::{Child, Command, Output, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use hypsogrid::demo::{write_demo_cycle, DEMO_FILE_NAME};
use hypsogrid::netcdf_session::NoFileOpen;

const BIN: &str = env!("CARGO_BIN_EXE_hypsogrid");

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The Python to use, checked for the four packages.
fn python() -> PathBuf {
    let venv = repo().join("target/python-venv/bin/python");
    let candidate = match std::env::var_os("HYPSOGRID_PYTHON") {
        Some(p) => PathBuf::from(p),
        None if venv.exists() => venv,
        None => PathBuf::from("python3"),
    };
    let check = Command::new(&candidate)
        .args([
            "-c",
            "import grpc, grpc_tools.protoc, grpc_health.v1.health_pb2, grpc_reflection.v1alpha.reflection_pb2",
        ])
        .output_with_no_file_open();
    match check {
        Ok(out) if out.status.success() => candidate,
        Ok(out) => panic!(
            "'{}' lacks the Python gRPC packages ({}): run scripts/install-deps, which installs \
             examples/python/requirements.txt into target/python-venv",
            candidate.display(),
            String::from_utf8_lossy(&out.stderr).trim()
        ),
        Err(e) => panic!(
            "cannot run '{}' ({e}): install python3 and run scripts/install-deps",
            candidate.display()
        ),
    }
}

struct Server {
    child: Child,
    address: String,
}

impl Server {
    fn start(data: &str, extra: &[&str]) -> Server {
        let mut child = Command::new(BIN)
            .args([
                "serve",
                "--data",
                data,
                "--listen",
                "127.0.0.1:0",
                "--settle",
                "0s",
            ])
            .args(extra)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn_with_no_file_open()
            .expect("starting hypsogrid serve");
        let stderr = child.stderr.take().expect("piped stderr");
        let (tx, rx) = mpsc::channel();
        std::thread::spawn(move || {
            // The address, once the startup scan has loaded the folder.
            let mut address = None;
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                if let Some(a) = line.strip_prefix("listening on ") {
                    address = Some(a.trim().to_string());
                }
                if line.starts_with("data folder scanned") {
                    if let Some(a) = address.take() {
                        let _ = tx.send(a);
                    }
                }
            }
        });
        let address = match rx.recv_timeout(Duration::from_secs(60)) {
            Ok(a) => a,
            Err(_) => {
                let _ = child.kill();
                panic!("the server printed no 'listening on' and 'data folder scanned' lines");
            }
        };
        Server { child, address }
    }

    fn wait_serving(&self) {
        let url = format!("http://{}", self.address);
        let deadline = Instant::now() + Duration::from_secs(60);
        while Instant::now() < deadline {
            let ok = Command::new(BIN)
                .args(["health", "--server", &url])
                .output_with_no_file_open()
                .map(|o| o.status.success())
                .unwrap_or(false);
            if ok {
                return;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        panic!("the server never became SERVING");
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        // SAFETY: kill(2) on the pid of a child this test started and has not reaped.
        unsafe {
            libc::kill(self.child.id() as libc::pid_t, libc::SIGTERM);
        }
        let deadline = Instant::now() + Duration::from_secs(10);
        while Instant::now() < deadline {
            if let Ok(Some(_)) = self.child.try_wait() {
                return;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn text(out: &Output) -> (String, String) {
    (
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn python_client_checks_health_lists_services_and_queries_catalogue_area_and_position() {
    let python = python();
    let dir = tempfile::tempdir().unwrap();
    write_demo_cycle(dir.path()).unwrap();
    let data = dir.path().to_string_lossy().into_owned();
    // A small message limit, so that the whole-region area comes in several chunks that the
    // client must put back together.
    let server = Server::start(&data, &["--max-message-bytes", "32KiB"]);
    server.wait_serving();

    let out = Command::new(&python)
        .arg(repo().join("examples/python/client.py"))
        .args([
            "--target",
            &server.address,
            "--bbox",
            "50,62,-45,-25",
            "--stride",
            "1",
        ])
        .output_with_no_file_open()
        .expect("running client.py");
    let (stdout, stderr) = text(&out);
    assert!(
        out.status.success(),
        "client.py failed:\n{stdout}\n{stderr}"
    );
    assert!(stdout.contains("health: SERVING"), "{stdout}");
    for service in [
        "hypsogrid.v1.HeightService",
        "grpc.health.v1.Health",
        "grpc.reflection.v1alpha.ServerReflection",
    ] {
        assert!(
            stdout.contains(service),
            "reflection lists {service}:\n{stdout}"
        );
    }
    assert!(
        stdout.contains(&format!("cycle {DEMO_FILE_NAME}")),
        "{stdout}"
    );
    assert!(
        stdout.contains("reference 2031-01-14T00:00:00Z"),
        "{stdout}"
    );
    // The catalogue's heights_ready as grpcio reads it: ready, or (should the client ask
    // within the few milliseconds after the cycle is listed) still computing.
    assert!(
        ["ready", "computing"]
            .iter()
            .any(|state| stdout.contains(&format!(
                "lead times +0h, +6h, +12h, +18h, +24h, +36h, +48h, heights {state}"
            ))),
        "{stdout}"
    );
    // The demo grid is 49 x 81 at 0.25 degrees.
    assert!(stdout.contains("49 rows x 81 columns"), "{stdout}");
    let chunks: usize = stdout
        .split(" columns in ")
        .nth(1)
        .and_then(|rest| rest.split(' ').next())
        .and_then(|n| n.parse().ok())
        .unwrap_or_else(|| panic!("no chunk count in:\n{stdout}"));
    assert!(
        chunks >= 2,
        "32 KiB messages split the area: {chunks} chunk(s)"
    );
    assert!(stdout.contains("thickness 1000-500 hPa: min"), "{stdout}");
    assert!(stdout.contains("height 500 hPa: min"), "{stdout}");
    assert!(stdout.contains("position: 2 point(s)"), "{stdout}");
    assert!(stdout.contains("55.4, -42.9: +0h"), "{stdout}");
    assert!(stdout.contains("caution"), "{stdout}");
    // The product service through the same Python client: guidance at both points (the
    // demo's mild sector at 55.4 N 42.9 W and the cold north-east at 58.65 N 29.4 W), and a
    // PNG chart.
    assert!(stdout.contains("guidance: lead"), "{stdout}");
    assert!(stdout.contains("55.4, -42.9: "), "{stdout}");
    assert!(stdout.contains("bytes of PNG"), "{stdout}");
    assert!(stdout.contains("licensed forecasters decide"), "{stdout}");
}

#[test]
fn python_reflection_alone_discovers_the_query_methods() {
    let python = python();
    let dir = tempfile::tempdir().unwrap();
    write_demo_cycle(dir.path()).unwrap();
    let data = dir.path().to_string_lossy().into_owned();
    let server = Server::start(&data, &[]);
    server.wait_serving();
    // No stubs: the descriptors come from the server (grpcio-reflection speaks v1alpha).
    let script = r#"
import sys, grpc
from google.protobuf.descriptor_pool import DescriptorPool
from grpc_reflection.v1alpha.proto_reflection_descriptor_database import ProtoReflectionDescriptorDatabase
with grpc.insecure_channel(sys.argv[1]) as channel:
    db = ProtoReflectionDescriptorDatabase(channel)
    print("services:", " ".join(sorted(db.get_services())))
    pool = DescriptorPool(db)
    service = pool.FindServiceByName("hypsogrid.v1.HeightService")
    for m in service.methods:
        print("method", m.name, m.input_type.full_name, m.output_type.full_name)
    area = pool.FindMessageTypeByName("hypsogrid.v1.AreaRequest")
    print("area fields:", " ".join(f.name for f in area.fields))
"#;
    let out = Command::new(&python)
        .args(["-c", script, &server.address])
        .output_with_no_file_open()
        .expect("running python");
    let (stdout, stderr) = text(&out);
    assert!(
        out.status.success(),
        "reflection script failed:\n{stdout}\n{stderr}"
    );
    for m in [
        "method GetCatalogue hypsogrid.v1.CatalogueRequest hypsogrid.v1.CatalogueResponse",
        "method QueryArea hypsogrid.v1.AreaRequest hypsogrid.v1.AreaChunk",
        "method QueryPosition",
        "method QueryProfile",
        "method QueryTrajectory",
    ] {
        assert!(stdout.contains(m), "{m}:\n{stdout}");
    }
    assert!(
        stdout.contains("bbox") && stdout.contains("stride"),
        "{stdout}"
    );
}

#[test]
fn python_client_fails_with_a_message_when_the_server_refuses() {
    let python = python();
    let dir = tempfile::tempdir().unwrap();
    write_demo_cycle(dir.path()).unwrap();
    let tokens = dir.path().join("tokens.txt");
    std::fs::write(&tokens, "python-secret\n").unwrap();
    let data = dir.path().to_string_lossy().into_owned();
    let tokens_arg = tokens.to_string_lossy().into_owned();
    let server = Server::start(&data, &["--auth-tokens", &tokens_arg]);
    server.wait_serving();
    let client = repo().join("examples/python/client.py");

    // Without the token: health passes (open for probes), the catalogue is refused.
    let out = Command::new(&python)
        .arg(&client)
        .args(["--target", &server.address])
        .env_remove("HYPSOGRID_TOKEN")
        .output_with_no_file_open()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert_eq!(out.status.code(), Some(1), "{stdout}\n{stderr}");
    assert!(stdout.contains("health: SERVING"), "{stdout}");
    assert!(stderr.contains("UNAUTHENTICATED"), "{stderr}");

    // With it: the whole run succeeds.
    let out = Command::new(&python)
        .arg(&client)
        .args(["--target", &server.address, "--token", "python-secret"])
        .output_with_no_file_open()
        .unwrap();
    let (stdout, stderr) = text(&out);
    assert!(out.status.success(), "{stdout}\n{stderr}");
}
