//! Progress bars on standard error, with one look and one time estimate for every long job.
//!
//! indicatif's own `{eta}` follows the rate of the last few steps, so it jumps whenever the
//! steps' costs change (validation's stages: 2 s left, then 11 s). Ours divides the time so far
//! by the share done — the mean rate of the whole run — and rounds what it shows, so it moves
//! steadily and never claims more precision than it has.

use indicatif::{ProgressBar, ProgressState, ProgressStyle};
use std::time::Duration;

/// A bar of `len` steps drawn as `{prefix} ▕bar▏ {counter} ({left})`, hidden unless `show`;
/// `counter` is an indicatif template part such as `{pos}/{len} cells`.
pub fn bar(show: bool, len: u64, prefix: &str, counter: &str) -> ProgressBar {
    let bar = if show {
        ProgressBar::new(len)
    } else {
        ProgressBar::hidden()
    };
    let template = format!("{prefix} {{bar:40.cyan/blue}} {counter} ({{left}})");
    bar.set_style(
        ProgressStyle::with_template(&template)
            .expect("the template is built from fixed parts")
            .progress_chars("█▉▊▋▌▍▎▏ ")
            .with_key("left", |s: &ProgressState, w: &mut dyn std::fmt::Write| {
                let _ = w.write_str(&time_left(s.elapsed(), s.pos(), s.len()));
            }),
    );
    bar
}

/// A spinner with a message for work without a known length (hidden when not on a terminal).
pub fn spinner(show: bool, msg: &'static str) -> ProgressBar {
    if !show {
        return ProgressBar::hidden();
    }
    let bar = ProgressBar::new_spinner();
    bar.set_style(
        ProgressStyle::with_template("{spinner} {msg} ({elapsed})").expect("static template"),
    );
    bar.set_message(msg);
    bar.enable_steady_tick(std::time::Duration::from_millis(120));
    bar
}

/// Seconds left at the whole run's mean rate so far; None until two steps and a second passed.
pub fn seconds_left(elapsed: Duration, pos: u64, len: u64) -> Option<f64> {
    (pos >= 2 && pos <= len && elapsed >= Duration::from_secs(1))
        .then(|| elapsed.as_secs_f64() * (len - pos) as f64 / pos as f64)
}

/// The time left at the whole run's mean rate so far, rounded to what it can tell.
pub fn time_left(elapsed: Duration, pos: u64, len: Option<u64>) -> String {
    let Some(len) = len.filter(|&l| l > 0) else {
        return "estimating".into();
    };
    if pos >= len {
        return "done".into();
    }
    let Some(left) = seconds_left(elapsed, pos, len) else {
        return "estimating".into();
    };
    if left < 10.0 {
        "a few s left".into()
    } else if left < 60.0 {
        format!("about {} s left", (left / 5.0).round() as u64 * 5)
    } else if left < 3600.0 {
        format!("about {} min left", (left / 60.0).round() as u64)
    } else {
        format!("about {:.1} h left", left / 3600.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_estimate_is_the_mean_rate_rounded() {
        let s = |secs: u64, pos, len| time_left(Duration::from_secs(secs), pos, Some(len));
        assert_eq!(s(0, 0, 10), "estimating");
        assert_eq!(s(5, 1, 10), "estimating");
        assert_eq!(s(10, 5, 10), "about 10 s left");
        assert_eq!(s(10, 2, 10), "about 40 s left");
        assert_eq!(s(60, 30, 100), "about 2 min left");
        assert_eq!(s(3, 9, 10), "a few s left");
        assert_eq!(s(3, 10, 10), "done");
        assert_eq!(s(3600, 1000, 3000), "about 2.0 h left");
        assert_eq!(time_left(Duration::from_secs(9), 3, None), "estimating");
    }

    /// Steps of two costs (a fast stage, then one three times slower): the estimate moves by
    /// less than the jump of a rate taken over the last few steps would.
    #[test]
    fn a_change_of_step_cost_moves_the_estimate_steadily() {
        let len = 100u64;
        let mut t = 0.0;
        let mut last: Option<f64> = None;
        for pos in 1..len {
            t += if pos <= 50 { 0.1 } else { 0.3 };
            let Some(left) = seconds_left(Duration::from_secs_f64(t), pos, len) else {
                continue;
            };
            if let Some(l) = last {
                // One step never moves the mean-rate estimate by more than a few steps' time.
                assert!((left - l).abs() < 1.0, "pos {pos}: {l} -> {left}");
            }
            last = Some(left);
        }
    }
}
