//! Times on the dashboard: in the feeder's own time zone, with UTC beside it
//! where a reader may compare with other systems.

use chrono::DateTime;
use chrono_tz::Tz;

/// A stored IANA zone name as a zone; UTC when it does not parse (the store
/// only keeps names it checked).
pub(crate) fn zone(name: &str) -> Tz {
    name.parse().unwrap_or(chrono_tz::UTC)
}

/// `2026-12-03 19:53 (Europe/Paris; 2026-12-03 18:53 UTC)`.
pub(crate) fn local_and_utc(t: i64, tz: Tz) -> String {
    let utc = DateTime::from_timestamp(t, 0).unwrap_or_default();
    format!("{} ({tz}; {} UTC)", utc.with_timezone(&tz).format("%Y-%m-%d %H:%M"), utc.format("%Y-%m-%d %H:%M"))
}

/// Like [`local_and_utc`], or a dash for no time.
pub(crate) fn local_when(t: Option<i64>, tz: Tz) -> String {
    t.map_or_else(|| "–".into(), |t| local_and_utc(t, tz))
}

/// The local date of `t` in `tz`, `2026-12-03`.
pub(crate) fn local_day(t: i64, tz: Tz) -> String {
    DateTime::from_timestamp(t, 0).unwrap_or_default().with_timezone(&tz).format("%Y-%m-%d").to_string()
}

/// A window `[from, to)` as its first and last local dates, `2026-11-01 – 2026-11-28`.
pub(crate) fn local_days(from: i64, to: i64, tz: Tz) -> String {
    format!("{} – {}", local_day(from, tz), local_day(to - 1, tz))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn local_time_sits_beside_utc() {
        // 2023-07-01 00:00 UTC is 02:00 in Paris (summer time, UTC+2) and the
        // evening before in Los Angeles (UTC-7): common knowledge of the zones.
        let t = 1_688_169_600;
        assert_eq!(local_and_utc(t, zone("Europe/Paris")), "2023-07-01 02:00 (Europe/Paris; 2023-07-01 00:00 UTC)");
        assert_eq!(local_day(t, zone("America/Los_Angeles")), "2023-06-30");
        assert_eq!(local_days(t, t + 86_400, zone("UTC")), "2023-07-01 – 2023-07-01");
        assert_eq!(local_when(None, zone("nowhere")), "–");
    }
}
