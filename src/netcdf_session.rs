//! One NetCDF file session at a time in this process.
//!
//! The NetCDF-C library and the HDF5 library under it, as Debian builds them, are not
//! thread-safe. The `netcdf` crate serialises each call, but two files written from two
//! threads at once still interleave inside HDF5 and can come out damaged (seen here as
//! `netcdf: hdf error` on reading a demo file that two test threads wrote together). Every
//! code path that opens or creates a file therefore holds this lock for the whole life of the
//! file handle: take the guard *before* opening, so that it is dropped after the file.
//!
//! The same lock keeps child processes from inheriting open files: HDF5 opens files without
//! close-on-exec and locks each one (`flock`), so a child started while a file is open holds
//! its lock until the child exits. Start children with [`NoFileOpen`].

use std::path::Path;
use std::process::{Child, Command, Output, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Mutex, MutexGuard, OnceLock};

static SESSION: Mutex<()> = Mutex::new(());

/// Whether the NetCDF library can open or create `path`: not when it contains a backslash.
/// Debian's netCDF-C 4.9 turns the backslash into something else before it opens the file
/// (a copy of a good cycle named `a\b.nc` failed to open with "netcdf: hdf error", and an
/// output named `o\ut.nc` with "Permission denied"), so such paths are refused up front
/// with a message that says why, rather than reported as a damaged file.
pub fn usable_path(path: &Path) -> bool {
    !path.as_os_str().as_encoded_bytes().contains(&b'\\')
}

/// Set once the process is stopping: see [`stop_reads`].
static STOPPING: AtomicBool = AtomicBool::new(false);

/// Asks every read of a cycle's fields in progress to stop before its next (member, time)
/// step, and every later read to stop before its first, with
/// [`crate::ingest::IngestError::Stopped`]; a variable read whole (a layout that needs it)
/// stops before its next slab (a band of about a megabyte, or a slab of whole chunks) with
/// [`crate::ingest::IngestError::StoppedInVariable`]. For a process that is stopping: a
/// server that waits, before it exits, for the read holding this session (see `hypsogrid
/// serve`) then waits for one step or slab of a file rather than all of it. It cannot be
/// undone.
pub fn stop_reads() {
    STOPPING.store(true, Ordering::Release);
}

/// Whether [`stop_reads`] was called.
pub fn reads_stopped() -> bool {
    STOPPING.load(Ordering::Acquire)
}

/// Waits for, and holds, the process-wide NetCDF session lock. The library's one-time set-up
/// ([`initialize`]) runs before the first lock is given.
///
/// A panic while the lock was held leaves nothing to repair (the file handle is closed on
/// unwinding), so a poisoned lock is simply taken over.
pub fn lock() -> MutexGuard<'static, ()> {
    set_up();
    SESSION
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// Starting a child process while no NetCDF file is open in this process.
///
/// The HDF5 library under NetCDF-4 opens files without close-on-exec and locks each one
/// (`flock`: exclusive while it is written, shared while it is read). A child started while
/// a file is open inherits the descriptor, and with it the lock, until the child exits; the
/// file then cannot be opened again in this process meanwhile (`netcdf: hdf error`). A test
/// that wrote a file and read it back failed this way whenever another test of the same
/// process had a Python process running (74 runs in 80 with the two tests alone). Holding
/// the session ([`lock`]) while the child starts means that no such descriptor exists at that
/// moment. This crate's own programs start no children; tests, and programs that use this
/// crate and start children, do so through these methods. They wait for the session, so a
/// thread that holds it already must not call them (the lock is not reentrant).
pub trait NoFileOpen {
    /// `Command::spawn`, while no NetCDF file is open in this process.
    ///
    /// # Errors
    /// As `Command::spawn`.
    fn spawn_with_no_file_open(&mut self) -> std::io::Result<Child>;

    /// `Command::output`, the child started while no NetCDF file is open in this process:
    /// standard input empty, standard output and error captured.
    ///
    /// # Errors
    /// As `Command::output`.
    fn output_with_no_file_open(&mut self) -> std::io::Result<Output>;
}

impl NoFileOpen for Command {
    fn spawn_with_no_file_open(&mut self) -> std::io::Result<Child> {
        let _session = lock();
        self.spawn()
    }

    fn output_with_no_file_open(&mut self) -> std::io::Result<Output> {
        self.stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped());
        self.spawn_with_no_file_open()?.wait_with_output()
    }
}

/// Whether another open of `path` holds an exclusive `flock` on it: what HDF5 takes on a
/// NetCDF-4 file while it is written (from another process, or a descriptor a child
/// inherited), and why, with its own locking on, it then refuses to open the file. Asked
/// before every read of a cycle file and again when an open fails: the shared lock it tries
/// for is released at once (a writer that opens the file in those microseconds is refused by
/// its HDF5, as it would be throughout a read with HDF5's locking on).
pub(crate) fn locked_for_writing(path: &Path) -> bool {
    use std::os::fd::AsRawFd;
    let Ok(file) = std::fs::File::open(path) else {
        return false;
    };
    // SAFETY: `flock` on a descriptor this function owns; a lock it takes goes with the
    // descriptor when `file` is dropped below.
    let status = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_SH | libc::LOCK_NB) };
    status != 0 && std::io::Error::last_os_error().raw_os_error() == Some(libc::EWOULDBLOCK)
}

extern "C" {
    /// The NetCDF-C library's one-time set-up (`netcdf.h`, 4.6.2 and later).
    fn nc_initialize() -> std::os::raw::c_int;
}

/// Runs the NetCDF-C library's one-time set-up now (it runs anyway before the first
/// [`lock`]; an early call only moves it out of the first file's time).
///
/// The set-up runs at the library's first call, and Debian's build of it then initialises
/// libcurl and through it OpenSSL, which keeps state for the thread that did it. When that
/// thread was a worker (a file read on a blocking thread of the server) and exited while the
/// process was exiting, OpenSSL's per-thread clean-up ran at the same time as its
/// process-wide clean-up on the main thread, and the server, already stopped, died of heap
/// corruption (SIGABRT or SIGSEGV after SIGTERM: one run in 25, then one in 72, of
/// `tests/serve_cli.rs`, which stops five servers a run; the core showed the main thread in
/// `OPENSSL_cleanup` under `exit` and an exiting worker in OpenSSL's thread-local
/// destructor). The set-up therefore runs on a thread of its own, `netcdf-setup`, which then
/// sleeps for the life of the process: its thread-local destructors never run, whichever
/// thread asked first (a test's thread, a worker) and whenever that thread ends. (Until
/// then the server's main thread did the set-up before starting others; test binaries, whose
/// first file is opened on a test's thread, had no such guard.)
///
/// # Errors
/// The library's status code when the set-up fails (the first file operation would then
/// report the same failure).
pub fn initialize() -> Result<(), i32> {
    match set_up() {
        0 => Ok(()),
        status => Err(status),
    }
}

/// The set-up's status, once it has run.
static SET_UP: OnceLock<i32> = OnceLock::new();

/// Runs the set-up once, on the `netcdf-setup` thread (on the calling thread if no thread
/// can be started), and returns its status. Every caller waits until it is done; no call
/// into the library can come before, since each takes [`lock`] first.
fn set_up() -> i32 {
    *SET_UP.get_or_init(|| {
        let (done_tx, done_rx) = std::sync::mpsc::channel();
        let started = std::thread::Builder::new()
            .name("netcdf-setup".into())
            .stack_size(256 << 10)
            .spawn(move || {
                // SAFETY: a plain call without arguments; no other call into the library
                // runs meanwhile (every caller waits in `get_or_init`).
                let status = unsafe { nc_initialize() };
                let _ = done_tx.send(status);
                // Never ends, so that the state the set-up left with this thread is never
                // torn down while the process exits.
                loop {
                    std::thread::park();
                }
            });
        match started.ok().and_then(|_| done_rx.recv().ok()) {
            Some(status) => status,
            // SAFETY: as above, on this thread instead.
            None => unsafe { nc_initialize() },
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A child started while another thread writes a NetCDF-4 file waits for the file to be
    /// closed, and the file then opens again in this process while the child still runs.
    #[test]
    fn a_child_starts_only_once_no_file_is_open() {
        let dir = tempfile::tempdir().expect("temporary folder");
        let path = dir.path().join("written.nc");
        let (opened_tx, opened_rx) = std::sync::mpsc::channel();
        let writer = {
            let path = path.clone();
            std::thread::spawn(move || {
                let _session = lock();
                crate::hdf5::quiet_on_this_thread();
                let mut file = netcdf::create_with(&path, netcdf::Options::NETCDF4)
                    .expect("creating the file");
                file.add_dimension("x", 3).expect("dimension");
                let mut var = file.add_variable::<f32>("v", &["x"]).expect("variable");
                var.put_values(&[1.0f32, 2.0, 3.0], ..).expect("values");
                opened_tx.send(()).expect("telling the test");
                // The child must not start while the file is open.
                std::thread::sleep(std::time::Duration::from_millis(200));
            })
        };
        opened_rx.recv().expect("the writer has the file open");
        let mut child = Command::new("sleep")
            .arg("2")
            .spawn_with_no_file_open()
            .expect("starting sleep");
        writer.join().expect("the writer");
        let reopened = {
            let _session = lock();
            crate::hdf5::quiet_on_this_thread();
            netcdf::open(&path).map(|file| file.variable("v").is_some())
        };
        let running = child.try_wait().expect("the child's state").is_none();
        let _ = child.kill();
        let _ = child.wait();
        assert!(
            running,
            "the check ran after the child had exited: it shows nothing"
        );
        assert!(
            matches!(reopened, Ok(true)),
            "the file did not open again while the child ran: {reopened:?}"
        );
    }

    /// The set-up runs once, on its own thread, which stays.
    #[test]
    fn the_set_up_runs_on_a_thread_that_stays() {
        assert_eq!(initialize(), Ok(()));
        drop(lock());
        assert_eq!(initialize(), Ok(()));
        let names: Vec<String> = std::fs::read_dir("/proc/self/task")
            .expect("listing this process's threads")
            .filter_map(|task| std::fs::read_to_string(task.ok()?.path().join("comm")).ok())
            .map(|name| name.trim().to_string())
            .collect();
        assert_eq!(
            names.iter().filter(|n| *n == "netcdf-setup").count(),
            1,
            "{names:?}"
        );
    }
}
