//! Calendar dates of Unix times, UTC (civil-from-days conversion of the proleptic Gregorian
//! calendar): for recording file names and the session start an NWB export writes.

/// (year, month, day, hour, minute, second) of `unix_s` seconds since 1970-01-01T00:00:00Z.
pub fn civil_utc(unix_s: i64) -> [i64; 6] {
    let days = unix_s.div_euclid(86_400);
    let secs = unix_s.rem_euclid(86_400);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    [y, m, d, secs / 3600, (secs / 60) % 60, secs % 60]
}

#[cfg(test)]
mod tests {
    #[test]
    fn known_dates() {
        assert_eq!(super::civil_utc(0), [1970, 1, 1, 0, 0, 0]);
        // 2000-02-29 12:34:56 UTC = 951 827 696 s (a leap century's leap day).
        assert_eq!(super::civil_utc(951_827_696), [2000, 2, 29, 12, 34, 56]);
        assert_eq!(super::civil_utc(-1), [1969, 12, 31, 23, 59, 59]);
    }
}
