//! Helpers shared by the CLI's end-to-end tests.
#![allow(dead_code)]

use std::path::Path;
use std::process::Command;

/// Runs the real `auspex` binary in `dir`: (success, standard output, standard error).
pub fn auspex(dir: &Path, args: &[&str]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stdout).to_string(),
        String::from_utf8_lossy(&out.stderr).to_string(),
    )
}

/// The tests that run a daemon, one at a time (a two-core machine running them side by side
/// starves some of them for seconds).
pub fn serial() -> std::sync::MutexGuard<'static, ()> {
    static LOCK: std::sync::Mutex<()> = std::sync::Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}

/// A loopback port free a moment ago.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind(("127.0.0.1", 0))
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}
