//! Time in ticks of the acquisition clock: the one rule for how many ticks a bin holds, and the
//! checked tick arithmetic the engine, fitting and the offline paths share.
//!
//! Must not: round a bin width that is not a whole number of ticks (a bin would then drift
//! against the clock), or let a tick sum wrap.

/// Why a bin width and a clock do not fit together.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum TickError {
    /// The clock rate is not a finite number > 0.
    #[error("tick rate {0} Hz must be a finite number > 0")]
    Rate(f64),
    /// The bin is not a whole number of ticks (or less than one).
    #[error("bin width {bin_width_s} s is not a whole number of ticks at {tick_rate_hz} Hz")]
    NotWhole {
        /// Bin width, s.
        bin_width_s: f64,
        /// Clock rate, Hz.
        tick_rate_hz: f64,
    },
    /// More ticks per bin than 64 bits hold.
    #[error("bin width {bin_width_s} s at {tick_rate_hz} Hz is more ticks than fit in 64 bits")]
    TooLong {
        /// Bin width, s.
        bin_width_s: f64,
        /// Clock rate, Hz.
        tick_rate_hz: f64,
    },
}

/// Ticks per bin: `bin_width_s × tick_rate_hz`, which must be a whole number ≥ 1 (within a
/// relative 1e-6, the slack of a rate written in decimal).
pub fn bin_ticks(bin_width_s: f64, tick_rate_hz: f64) -> Result<i64, TickError> {
    if !(tick_rate_hz.is_finite() && tick_rate_hz > 0.0) {
        return Err(TickError::Rate(tick_rate_hz));
    }
    let exact = bin_width_s * tick_rate_hz;
    let whole = exact.round();
    if whole.is_nan() || whole < 1.0 || (whole - exact).abs() > 1e-6 * exact.max(1.0) {
        return Err(TickError::NotWhole {
            bin_width_s,
            tick_rate_hz,
        });
    }
    if whole >= i64::MAX as f64 {
        return Err(TickError::TooLong {
            bin_width_s,
            tick_rate_hz,
        });
    }
    Ok(whole as i64)
}

/// The tick after the last of `n_bins` bins of `bin_ticks` from `onset` (the window's exclusive
/// end), or None where it would leave the tick range.
pub fn window_end(onset: i64, bin_ticks: i64, n_bins: usize) -> Option<i64> {
    bin_ticks
        .checked_mul(i64::try_from(n_bins).ok()?)
        .and_then(|w| onset.checked_add(w))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bins_are_whole_numbers_of_ticks() {
        assert_eq!(bin_ticks(0.001, 30_000.0), Ok(30));
        assert_eq!(bin_ticks(0.001, 1e6), Ok(1000));
        // 1 ms at 24 414.0625 Hz (a rate some acquisition systems use; common practice, from
        // memory) is 24.4 ticks: refused, not rounded.
        assert!(matches!(
            bin_ticks(0.001, 24_414.062_5),
            Err(TickError::NotWhole { .. })
        ));
        assert!(matches!(
            bin_ticks(0.0001, 1000.0),
            Err(TickError::NotWhole { .. })
        ));
        for bad in [0.0, -1.0, f64::NAN, f64::INFINITY] {
            assert!(matches!(bin_ticks(0.001, bad), Err(TickError::Rate(_))));
        }
        assert!(matches!(
            bin_ticks(1e10, 1e10),
            Err(TickError::TooLong { .. })
        ));
    }

    #[test]
    fn window_ends_never_wrap() {
        assert_eq!(window_end(100, 30, 250), Some(7600));
        assert_eq!(window_end(i64::MAX - 10, 30, 250), None);
        assert_eq!(window_end(0, i64::MAX, 2), None);
    }
}
