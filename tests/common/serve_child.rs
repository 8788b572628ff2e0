//! `hypsogrid serve` as a child process on 127.0.0.1:0, for tests that run the binary the
//! way an operator does: its bound address read from the "listening on" line, its stderr kept
//! for failure messages, signals sent with kill(2), and a kill on drop if a test fails early.
#![allow(dead_code)]

use hypsogrid::netcdf_session::NoFileOpen;
use std::io::{BufRead, BufReader};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// The binary under test.
pub const BIN: &str = env!("CARGO_BIN_EXE_hypsogrid");

/// A running `hypsogrid serve` child.
pub struct ServeChild {
    /// The child process.
    pub child: Child,
    /// The address it listens on, `127.0.0.1:PORT`.
    pub address: String,
    stderr: Arc<Mutex<Vec<String>>>,
}

impl ServeChild {
    /// Starts `hypsogrid serve ARGS` with extra environment `env` (an inherited
    /// HYPSOGRID_ALLOW_INSECURE_REMOTE is removed, so that only the test decides) and waits for
    /// its "listening on" line, then for the end of its startup scan (its "data folder
    /// scanned" line), so that the files of its folder are loaded (or failed).
    pub fn start(args: &[&str], env: &[(&str, &str)]) -> ServeChild {
        let server = Self::start_listening(args, env);
        server.wait_for_log("data folder scanned");
        server
    }

    /// Starts `hypsogrid serve ARGS` as [`ServeChild::start`] does and waits for its
    /// "listening on" line only: the startup scan may still be loading files.
    pub fn start_listening(args: &[&str], env: &[(&str, &str)]) -> ServeChild {
        let (mut child, lines, listening) = Self::spawn(args, env);
        let address = match listening.recv_timeout(Duration::from_secs(60)) {
            Ok(a) => a,
            Err(_) => {
                let _ = child.kill();
                panic!(
                    "the server printed no 'listening on' line:\n{}",
                    lines.lock().unwrap().join("\n")
                );
            }
        };
        ServeChild {
            child,
            address,
            stderr: lines,
        }
    }

    /// Starts `hypsogrid serve ARGS` as [`ServeChild::start`] does, without waiting for
    /// anything: `address` stays empty (the server may stop before it listens).
    pub fn start_unready(args: &[&str], env: &[(&str, &str)]) -> ServeChild {
        let (child, lines, _) = Self::spawn(args, env);
        ServeChild {
            child,
            address: String::new(),
            stderr: lines,
        }
    }

    /// The child, its stderr lines as they come, and the address of its "listening on" line
    /// when it comes.
    #[allow(clippy::type_complexity)]
    fn spawn(
        args: &[&str],
        env: &[(&str, &str)],
    ) -> (Child, Arc<Mutex<Vec<String>>>, mpsc::Receiver<String>) {
        let mut cmd = Command::new(BIN);
        cmd.arg("serve")
            .args(args)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .env_remove("HYPSOGRID_ALLOW_INSECURE_REMOTE");
        for (k, v) in env {
            cmd.env(k, v);
        }
        let mut child = cmd
            .spawn_with_no_file_open()
            .expect("starting hypsogrid serve");
        let stderr = child.stderr.take().expect("stderr is piped");
        let lines = Arc::new(Mutex::new(Vec::new()));
        let (tx, rx) = mpsc::channel();
        let keep = Arc::clone(&lines);
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                if let Some(addr) = line.strip_prefix("listening on ") {
                    let _ = tx.send(addr.trim().to_string());
                }
                keep.lock().unwrap().push(line);
            }
        });
        (child, lines, rx)
    }

    /// Waits (at most 60 s) until a line of its log contains `text`.
    pub fn wait_for_log(&self, text: &str) {
        let deadline = Instant::now() + Duration::from_secs(60);
        while !self.stderr.lock().unwrap().iter().any(|l| l.contains(text)) {
            assert!(
                Instant::now() < deadline,
                "no log line with '{text}':\n{}",
                self.log()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// `http://ADDRESS`, for `--server`.
    pub fn url(&self) -> String {
        format!("http://{}", self.address)
    }

    /// The port it listens on.
    pub fn port(&self) -> u16 {
        self.address
            .rsplit(':')
            .next()
            .and_then(|p| p.parse().ok())
            .unwrap_or_else(|| panic!("no port in '{}'", self.address))
    }

    /// Its stderr lines, shared with the thread that reads them (they outlive the child).
    pub fn stderr_lines(&self) -> &Arc<Mutex<Vec<String>>> {
        &self.stderr
    }

    /// Everything it has written to stderr so far.
    pub fn log(&self) -> String {
        self.stderr.lock().unwrap().join("\n")
    }

    /// Sends a signal.
    pub fn signal(&self, signal: libc::c_int) {
        // SAFETY: kill(2) on the pid of a child this test started and has not reaped.
        let rc = unsafe { libc::kill(self.child.id() as libc::pid_t, signal) };
        assert_eq!(rc, 0, "sending signal {signal}");
    }

    /// Sends SIGTERM and returns the exit code and how long the exit took (at most 15 s).
    pub fn terminate(mut self) -> (Option<i32>, Duration) {
        self.signal(libc::SIGTERM);
        let started = Instant::now();
        loop {
            if let Some(status) = self.child.try_wait().expect("waiting for the server") {
                let elapsed = started.elapsed();
                if status.code() != Some(0) {
                    // For the failure message of the test that expected 0: the last lines
                    // reach the reading thread shortly after the exit.
                    std::thread::sleep(Duration::from_millis(200));
                    eprintln!(
                        "the server ended with {status} after SIGTERM; its log:\n{}",
                        self.log()
                    );
                }
                return (status.code(), elapsed);
            }
            if started.elapsed() > Duration::from_secs(15) {
                let _ = self.child.kill();
                panic!(
                    "the server did not exit within 15 s of SIGTERM:\n{}",
                    self.log()
                );
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}

impl Drop for ServeChild {
    fn drop(&mut self) {
        // Only reached on a failing test (terminate() waits for the child); killing an exited
        // child is harmless.
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
