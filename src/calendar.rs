//! Unix times as calendar dates (UTC, proleptic Gregorian), without a date library: the
//! one conversion the demo corpus, the operator commands and the status page share.

/// The civil date `(year, month 1–12, day 1–31)` of a count of days since 1970-01-01, for
/// any `i64` day count a Unix time in seconds can give. Howard Hinnant's `civil_from_days`
/// ("chrono-Compatible Low-Level Date Algorithms"; from memory, checked in the tests
/// against dates GNU `date` prints).
pub fn civil_from_days(days: i64) -> (i64, u32, u32) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let month = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    let year = yoe + era * 400 + i64::from(month <= 2);
    (year, month, day)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dates_match_gnu_date() {
        // `date -u -d @SECONDS +%F` (GNU coreutils) for each of these times.
        for (seconds, date) in [
            (0_i64, (1970, 1, 1)),
            (951_782_400, (2000, 2, 29)),
            (1_709_164_800, (2024, 2, 29)),
            (1_798_675_200, (2026, 12, 31)),
            (-86_400, (1969, 12, 31)),
            (4_107_542_400, (2100, 3, 1)),
        ] {
            assert_eq!(
                civil_from_days(seconds.div_euclid(86_400)),
                date,
                "{seconds}"
            );
        }
    }
}
