//! The daemon's two clocks, read only at the edges: wall time for recording and latency, and a
//! monotonic clock for link deadlines and status ages.

use std::time::Instant;

/// Nanoseconds since the Unix epoch (wall clock; used for recording and latency only).
pub fn now_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0)
}

/// Nanoseconds on a monotonic clock shared by the link tasks and status.
pub fn mono_ns() -> i64 {
    static START: std::sync::OnceLock<Instant> = std::sync::OnceLock::new();
    START.get_or_init(Instant::now).elapsed().as_nanos() as i64
}
