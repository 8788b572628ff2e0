//! Security of `hypsogrid serve` as an operator runs it (a child process on 127.0.0.1:0):
//! token files holding SHA-256 digests, re-reading the token file on SIGHUP, client
//! certificates required by `--tls-client-ca`, and the refusal to listen on a non-loopback
//! address with neither TLS nor tokens.
//!
//! Digest values are the published examples of FIPS 180-2 Appendix B (SHA-256 of "abc" and of
//! the 56-byte two-block message); certificates are made by the `openssl` command (the test
//! says so and returns when it is missing).

use std::process::{Command, Output};
use std::sync::Arc;
use std::time::{Duration, Instant};

use hypsogrid::netcdf_session::NoFileOpen;
use hypsogrid::pb;
use hypsogrid::pb::height_service_client::HeightServiceClient;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

/// SHA-256("abc"): FIPS 180-2, Appendix B.1.
const ABC_SHA256: &str = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
/// The two-block message of FIPS 180-2 Appendix B.2 and its SHA-256.
const TWO_BLOCK: &str = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
const TWO_BLOCK_SHA256: &str = "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1";

mod common;

use common::serve_child::{ServeChild as Server, BIN};

impl Server {
    /// `hypsogrid catalogue` against this server, with a token when given.
    fn catalogue(&self, token: Option<&str>) -> Output {
        let url = self.url();
        let mut cmd = Command::new(BIN);
        cmd.args(["catalogue", "--server", &url, "--timeout", "10s"])
            .env_remove("HYPSOGRID_TOKEN");
        if let Some(t) = token {
            cmd.args(["--token", t]);
        }
        cmd.output_with_no_file_open()
            .expect("running the catalogue client")
    }

    /// True when the catalogue call with `token` is served; false when it is refused as
    /// UNAUTHENTICATED; any other failure fails the test.
    fn accepts(&self, token: &str) -> bool {
        let out = self.catalogue(Some(token));
        if out.status.success() {
            return true;
        }
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("UNAUTHENTICATED"),
            "token {token:?}: {err}\nserver log:\n{}",
            self.log()
        );
        false
    }

    /// Waits until `condition` holds, or fails with the server log.
    fn wait_until(&self, what: &str, mut condition: impl FnMut() -> bool) {
        let deadline = Instant::now() + Duration::from_secs(20);
        while Instant::now() < deadline {
            if condition() {
                return;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        panic!(
            "{what} did not happen within 20 s; server log:\n{}",
            self.log()
        );
    }
}

fn path_arg(p: &std::path::Path) -> String {
    p.to_string_lossy().into_owned()
}

#[test]
fn digest_lines_are_accepted_and_sighup_swaps_the_token_file() {
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("cycles");
    std::fs::create_dir(&data).unwrap();
    let tokens = dir.path().join("tokens.txt");
    std::fs::write(
        &tokens,
        format!(
            "# chart tools (digests only: this file may be readable by the whole office)\nsha256:{ABC_SHA256}\nsha256:{}\n",
            TWO_BLOCK_SHA256.to_uppercase()
        ),
    )
    .unwrap();
    let server = Server::start(
        &[
            "--data",
            &path_arg(&data),
            "--listen",
            "127.0.0.1:0",
            "--auth-tokens",
            &path_arg(&tokens),
        ],
        &[],
    );

    // The tokens whose digests the file holds are accepted (FIPS 180-2 B.1 and B.2).
    assert!(server.accepts("abc"));
    assert!(server.accepts(TWO_BLOCK));
    // Anything else is refused: a near miss, the digest itself, the whole digest line.
    assert!(!server.accepts("abd"));
    assert!(!server.accepts(ABC_SHA256));
    assert!(!server.accepts(&format!("sha256:{ABC_SHA256}")));
    let out = server.catalogue(None);
    assert!(String::from_utf8_lossy(&out.stderr).contains("UNAUTHENTICATED"));

    // SIGHUP with a new file: the new set replaces the old one as a whole.
    std::fs::write(&tokens, "fresh-token-2031\n").unwrap();
    server.signal(libc::SIGHUP);
    server.wait_until("the new token taking effect", || {
        server.accepts("fresh-token-2031")
    });
    assert!(!server.accepts("abc"), "the old set is gone");
    assert!(!server.accepts(TWO_BLOCK));

    // SIGHUP with a bad file (a digest line one digit short): logged, and the set in force
    // stays.
    std::fs::write(&tokens, format!("sha256:{}\n", &ABC_SHA256[..63])).unwrap();
    server.signal(libc::SIGHUP);
    server.wait_until("the bad file being reported", || {
        server.log().contains("previous tokens stay in force")
    });
    assert!(server.log().contains("line 1"), "{}", server.log());
    assert!(server.accepts("fresh-token-2031"));
    assert!(!server.accepts("abc"));

    // An emptied file is refused the same way.
    std::fs::write(&tokens, "# nobody\n").unwrap();
    let reports_before = server
        .log()
        .matches("previous tokens stay in force")
        .count();
    server.signal(libc::SIGHUP);
    server.wait_until("the empty file being reported", || {
        server
            .log()
            .matches("previous tokens stay in force")
            .count()
            > reports_before
    });
    assert!(server.accepts("fresh-token-2031"));

    assert_eq!(
        server.terminate().0,
        Some(0),
        "SIGHUP never ends the process"
    );
}

#[test]
fn a_non_loopback_address_is_refused_without_tls_tokens_or_an_explicit_yes() {
    let dir = tempfile::tempdir().unwrap();
    let data = path_arg(dir.path());
    let out = Command::new(BIN)
        .args(["serve", "--data", &data, "--listen", "0.0.0.0:0"])
        .env_remove("HYPSOGRID_ALLOW_INSECURE_REMOTE")
        .env_remove("HYPSOGRID_AUTH_TOKENS")
        .env_remove("HYPSOGRID_TLS_CERT")
        .output_with_no_file_open()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(err.trim_end().lines().count(), 1, "one line: {err}");
    assert!(err.contains("0.0.0.0:0"), "names the address: {err}");
    assert!(
        err.contains("--tls-cert") && err.contains("--auth-tokens"),
        "names the first way out: {err}"
    );
    assert!(
        err.contains("--allow-insecure-remote"),
        "names the second way out: {err}"
    );

    // Said explicitly, by flag or by environment, it starts.
    let server = Server::start(
        &[
            "--data",
            &data,
            "--listen",
            "0.0.0.0:0",
            "--allow-insecure-remote",
        ],
        &[],
    );
    assert!(server.address.starts_with("0.0.0.0:"), "{}", server.address);
    assert_eq!(server.terminate().0, Some(0));
    let server = Server::start(
        &["--data", &data, "--listen", "0.0.0.0:0"],
        &[("HYPSOGRID_ALLOW_INSECURE_REMOTE", "true")],
    );
    assert_eq!(server.terminate().0, Some(0));

    // Tokens protect it: no flag needed.
    let tokens = dir.path().join("tokens.txt");
    std::fs::write(&tokens, "office-token\n").unwrap();
    let server = Server::start(
        &[
            "--data",
            &data,
            "--listen",
            "0.0.0.0:0",
            "--auth-tokens",
            &path_arg(&tokens),
        ],
        &[],
    );
    assert_eq!(server.terminate().0, Some(0));
}

/// The PEM files of a test PKI made with the `openssl` command.
struct Pki {
    ca: Vec<u8>,
    client_cert: Vec<u8>,
    client_key: Vec<u8>,
    /// A client certificate signed by another authority.
    rogue_cert: Vec<u8>,
    rogue_key: Vec<u8>,
}

/// A CA, a server certificate for `localhost`, a client certificate from the same CA, and a
/// client certificate from an unrelated CA; `None` when `openssl` is missing.
fn make_pki(dir: &std::path::Path) -> Option<Pki> {
    let run = |args: &[&str]| {
        Command::new("openssl")
            .args(args)
            .current_dir(dir)
            .output_with_no_file_open()
            .map(|o| o.status.success())
            .unwrap_or(false)
    };
    std::fs::write(
        dir.join("server.ext"),
        "basicConstraints=CA:FALSE\nsubjectAltName=DNS:localhost\nkeyUsage=digitalSignature\nextendedKeyUsage=serverAuth\n",
    )
    .ok()?;
    std::fs::write(
        dir.join("client.ext"),
        "basicConstraints=CA:FALSE\nkeyUsage=digitalSignature\nextendedKeyUsage=clientAuth\n",
    )
    .ok()?;
    let new_ca = |name: &str, cn: &str| {
        run(&[
            "req",
            "-x509",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-keyout",
            &format!("{name}.key"),
            "-out",
            &format!("{name}.pem"),
            "-days",
            "2",
            "-subj",
            &format!("/CN={cn}"),
        ])
    };
    let new_leaf = |name: &str, cn: &str, ca: &str, ext: &str| {
        run(&[
            "req",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-keyout",
            &format!("{name}.key"),
            "-out",
            &format!("{name}.csr"),
            "-subj",
            &format!("/CN={cn}"),
        ]) && run(&[
            "x509",
            "-req",
            "-in",
            &format!("{name}.csr"),
            "-CA",
            &format!("{ca}.pem"),
            "-CAkey",
            &format!("{ca}.key"),
            "-CAcreateserial",
            "-out",
            &format!("{name}.pem"),
            "-days",
            "2",
            "-extfile",
            ext,
        ])
    };
    let made = new_ca("ca", "hypsogrid test ca")
        && new_ca("rogue-ca", "unrelated test ca")
        && new_leaf("server", "localhost", "ca", "server.ext")
        && new_leaf("client", "chart tool", "ca", "client.ext")
        && new_leaf("rogue", "chart tool", "rogue-ca", "client.ext");
    if !made {
        return None;
    }
    let read = |f: &str| std::fs::read(dir.join(f)).ok();
    Some(Pki {
        ca: read("ca.pem")?,
        client_cert: read("client.pem")?,
        client_key: read("client.key")?,
        rogue_cert: read("rogue.pem")?,
        rogue_key: read("rogue.key")?,
    })
}

/// Calls GetCatalogue over TLS, with a client identity when given; the error as text.
async fn catalogue_over_tls(
    port: u16,
    ca: &[u8],
    identity: Option<(&[u8], &[u8])>,
) -> Result<usize, String> {
    let mut tls = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(ca))
        .domain_name("localhost");
    if let Some((cert, key)) = identity {
        tls = tls.identity(Identity::from_pem(cert, key));
    }
    let channel = Channel::from_shared(format!("https://127.0.0.1:{port}"))
        .map_err(|e| e.to_string())?
        .tls_config(tls)
        .map_err(|e| e.to_string())?
        .connect_timeout(Duration::from_secs(10))
        .timeout(Duration::from_secs(10))
        .connect()
        .await
        .map_err(|e| format!("connect: {e}"))?;
    HeightServiceClient::new(channel)
        .get_catalogue(pb::CatalogueRequest {})
        .await
        .map(|r| r.into_inner().cycles.len())
        .map_err(|s| format!("{:?}: {}", s.code(), s.message()))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_client_ca_serves_only_clients_with_a_certificate_from_that_authority() {
    let dir = tempfile::tempdir().unwrap();
    let Some(pki) = make_pki(dir.path()) else {
        eprintln!("skipped: the openssl command is needed to make test certificates");
        return;
    };
    let data = dir.path().join("cycles");
    std::fs::create_dir(&data).unwrap();
    let (data, cert, key, ca) = (
        path_arg(&data),
        path_arg(&dir.path().join("server.pem")),
        path_arg(&dir.path().join("server.key")),
        path_arg(&dir.path().join("ca.pem")),
    );
    let server = tokio::task::spawn_blocking(move || {
        Server::start(
            &[
                "--data",
                &data,
                "--listen",
                "127.0.0.1:0",
                "--tls-cert",
                &cert,
                "--tls-key",
                &key,
                "--tls-client-ca",
                &ca,
            ],
            &[],
        )
    })
    .await
    .unwrap();
    let port = server.port();

    // A client with a certificate from the configured authority is served.
    let served = catalogue_over_tls(port, &pki.ca, Some((&pki.client_cert, &pki.client_key))).await;
    assert_eq!(served, Ok(0), "server log:\n{}", server.log());

    // Without a certificate, or with one from another authority, it is refused (at the
    // handshake, which TLS 1.3 may report only at the first call).
    let bare = catalogue_over_tls(port, &pki.ca, None).await;
    assert!(bare.is_err(), "served without a client certificate");
    let rogue = catalogue_over_tls(port, &pki.ca, Some((&pki.rogue_cert, &pki.rogue_key))).await;
    assert!(
        rogue.is_err(),
        "served with a certificate from another authority"
    );

    // The good client still works after the refusals.
    let again = catalogue_over_tls(port, &pki.ca, Some((&pki.client_cert, &pki.client_key))).await;
    assert_eq!(again, Ok(0));

    // The command-line client: served with --client-cert/--client-key from that authority,
    // refused without them or with the unrelated authority's, each failure in words.
    let file = |name: &str| path_arg(&dir.path().join(name));
    let (ca, client_pem, client_key, rogue_pem, rogue_key) = (
        file("ca.pem"),
        file("client.pem"),
        file("client.key"),
        file("rogue.pem"),
        file("rogue.key"),
    );
    let cli = move |identity: Option<(String, String)>| {
        let mut cmd = Command::new(BIN);
        cmd.args([
            "catalogue",
            "--server",
            &format!("https://localhost:{port}"),
        ])
        .args(["--ca-cert", &ca, "--timeout", "10s"])
        .env_remove("HYPSOGRID_CLIENT_CERT")
        .env_remove("HYPSOGRID_CLIENT_KEY");
        if let Some((cert, key)) = identity {
            cmd.args(["--client-cert", &cert, "--client-key", &key]);
        }
        cmd.output_with_no_file_open()
            .expect("running the catalogue client")
    };
    let cli_runs = tokio::task::spawn_blocking(move || {
        (
            cli(Some((client_pem.clone(), client_key.clone()))),
            cli(None),
            cli(Some((rogue_pem, rogue_key))),
            cli(Some((client_pem, String::new()))),
        )
    })
    .await
    .unwrap();
    let (served, bare, rogue, no_key) = cli_runs;
    assert!(
        served.status.success(),
        "{}\nserver log:\n{}",
        String::from_utf8_lossy(&served.stderr),
        server.log()
    );
    assert!(String::from_utf8_lossy(&served.stdout).contains("0 cycle(s) loaded"));
    for (what, out) in [("no certificate", &bare), ("another authority", &rogue)] {
        assert_eq!(out.status.code(), Some(1), "{what}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains("--client-cert"), "{what}: {err}");
        assert_eq!(err.trim_end().lines().count(), 1, "{what}: {err}");
    }
    // An empty --client-key is a file that cannot be read, named as such.
    let err = String::from_utf8_lossy(&no_key.stderr);
    assert!(err.contains("--client-key"), "{err}");
    assert_eq!(
        tokio::task::spawn_blocking(move || server.terminate().0)
            .await
            .unwrap(),
        Some(0)
    );
}

#[test]
fn tls_client_ca_without_tls_is_refused_in_one_line() {
    let dir = tempfile::tempdir().unwrap();
    let out = Command::new(BIN)
        .args([
            "serve",
            "--data",
            &path_arg(dir.path()),
            "--listen",
            "127.0.0.1:0",
            "--tls-client-ca",
            "ca.pem",
        ])
        .env_remove("HYPSOGRID_TLS_CERT")
        .env_remove("HYPSOGRID_TLS_KEY")
        .output_with_no_file_open()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(err.trim_end().lines().count(), 1, "{err}");
    assert!(
        err.contains("--tls-client-ca") && err.contains("--tls-cert"),
        "{err}"
    );
}

#[tokio::test]
async fn serve_on_refuses_a_client_ca_without_a_server_certificate() {
    use hypsogrid::service::{serve_on, ServiceConfig, ServiceError};
    use hypsogrid::store::{CycleStore, StoreConfig};
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let result = serve_on(
        listener,
        Arc::new(CycleStore::new(StoreConfig::default())),
        ServiceConfig {
            tls_client_ca: Some("ca.pem".into()),
            ..ServiceConfig::default()
        },
        std::future::ready(()),
    )
    .await;
    match result {
        Err(ServiceError::InvalidSetting { setting, message }) => {
            assert_eq!(setting, "tls_client_ca");
            assert!(message.contains("tls"), "{message}");
        }
        other => panic!("expected an invalid setting, got {other:?}"),
    }
}
