//! Temporary folders that live as long as the test process: for fixtures kept in a `static`
//! (loaded once for all the tests of a file), which Rust never drops, so that a
//! `tempfile::TempDir` there was never removed (two folders, 30 MB, left in the system's
//! temporary folder by every run of the suite).
#![allow(dead_code)]

use std::path::PathBuf;
use std::sync::{Mutex, Once};

static FOLDERS: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

/// Removes every folder [`until_exit`] kept, when the process exits normally (the test
/// harness returns from `main`, or exits with a failure code). A process killed by a
/// signal leaves them, as it would any temporary file.
extern "C" fn remove_folders() {
    if let Ok(folders) = FOLDERS.lock() {
        for folder in folders.iter() {
            let _ = std::fs::remove_dir_all(folder);
        }
    }
}

/// A new temporary folder, removed when the process exits.
pub fn until_exit() -> PathBuf {
    static REGISTER: Once = Once::new();
    REGISTER.call_once(|| {
        // SAFETY: registers a plain `extern "C"` function with no arguments; `atexit` only
        // keeps its address. A refusal (non-zero) leaves the folders behind, as before.
        unsafe {
            libc::atexit(remove_folders);
        }
    });
    let folder = tempfile::tempdir().expect("temporary folder").keep();
    FOLDERS
        .lock()
        .expect("the list of temporary folders")
        .push(folder.clone());
    folder
}
