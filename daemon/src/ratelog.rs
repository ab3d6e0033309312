//! Rate-limited warnings: a misbehaving peer can send thousands of bad messages a second; the
//! log shows the first few of each kind per second and then how many it left out.
//!
//! Must not: drop the count of anything (counters live with the engine thread).

use std::collections::HashMap;
use std::time::{Duration, Instant};

/// Logs at most a few messages per kind per second, then says how many were suppressed.
pub struct RateLimitedLog {
    window_start: Instant,
    counts: HashMap<&'static str, u32>,
    suppressed: HashMap<&'static str, u64>,
}

impl RateLimitedLog {
    /// A fresh limiter.
    pub fn new() -> Self {
        RateLimitedLog {
            window_start: Instant::now(),
            counts: HashMap::new(),
            suppressed: HashMap::new(),
        }
    }
    /// Whether a message of this kind may be logged now.
    pub fn allow(&mut self, kind: &'static str) -> bool {
        if self.window_start.elapsed() >= Duration::from_secs(1) {
            for (k, n) in self.suppressed.drain() {
                if n > 0 {
                    tracing::warn!(
                        kind = k,
                        suppressed = n,
                        "further messages of this kind were not logged"
                    );
                }
            }
            self.counts.clear();
            self.window_start = Instant::now();
        }
        let c = self.counts.entry(kind).or_insert(0);
        *c += 1;
        if *c <= 5 {
            true
        } else {
            *self.suppressed.entry(kind).or_insert(0) += 1;
            false
        }
    }
}

impl Default for RateLimitedLog {
    fn default() -> Self {
        Self::new()
    }
}
