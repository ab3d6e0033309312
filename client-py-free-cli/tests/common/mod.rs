//! Helpers shared by the CLI's end-to-end tests.

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
