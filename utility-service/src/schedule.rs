//! Settlement schedules: when each settlement day's runs are due.
//!
//! A settlement day is a UTC day, as in [`crate::settlement`], so that a day's
//! energy can equal its daily register advance. Its **initial** run is due as
//! soon as the day has ended and its stored readings reach the feeder's
//! completeness threshold, or at the latest at the configured local time after
//! the day (its deadline), whichever comes first. Each **later** run (the
//! operator names its kind, e.g. `interim`, `final`) is due at the same local
//! time a given number of days after that deadline. Nothing here reads a clock:
//! the caller passes the time, so simulated days can drive it.

use chrono::{DateTime, Days, NaiveDate, NaiveTime, TimeZone, Utc};
use chrono_tz::Tz;
use meterveil_shared::FieldError;
use serde::{Deserialize, Serialize};

const DAY: i64 = 86_400;
/// Later runs one schedule may name.
pub const MAX_LATER_RUNS: usize = 6;
/// Longest delay of a later run, days.
pub const MAX_AFTER_DAYS: u32 = 60;
/// How far back a scheduler looks for days still owed a run (catch-up after a
/// long outage stops here).
pub const CATCH_UP_DAYS: i64 = 93;

/// A later run: its kind and its delay in days after the initial run's deadline.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LaterRun {
    pub kind: String,
    pub after_days: u32,
}

/// A feeder's settlement schedule, as stored and as `PUT` takes it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Schedule {
    /// First UTC day (`YYYY-MM-DD`) to settle; earlier days get no run.
    pub first_day: String,
    /// Fraction of the day's intervals (meters × intervals) that must be stored
    /// for the initial run to start before its deadline; 0.5 to 1.
    pub completeness: f64,
    /// Local time (`HH:MM`, the feeder's time zone) after the day at which the
    /// initial run starts however complete the day is.
    pub initial_by: String,
    #[serde(default)]
    pub later_runs: Vec<LaterRun>,
    /// Days in a run's recovery window, ending with the settled day.
    #[serde(default = "default_window_days")]
    pub window_days: u32,
}

fn default_window_days() -> u32 {
    28
}

/// The run kind every settled day starts with.
pub const INITIAL: &str = "initial";

/// A run kind: 1 to 32 lowercase letters, digits, `-` or `_`.
pub fn check_kind(field: &str, kind: &str) -> Result<(), FieldError> {
    let ok = (1..=32).contains(&kind.len())
        && kind.chars().all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-' || c == '_');
    if ok {
        Ok(())
    } else {
        Err(FieldError::new(field, format!("{kind:?} is not 1 to 32 lowercase letters, digits, '-' or '_'")))
    }
}

/// A `YYYY-MM-DD` date as the UTC epoch second of its midnight.
pub fn parse_day(field: &str, s: &str) -> Result<i64, FieldError> {
    let d = NaiveDate::parse_from_str(s, "%Y-%m-%d")
        .map_err(|_| FieldError::new(field, format!("{s:?} is not a date YYYY-MM-DD")))?;
    Ok(d.and_time(NaiveTime::MIN).and_utc().timestamp())
}

/// The UTC date of an epoch second.
pub fn day_name(t: i64) -> String {
    DateTime::<Utc>::from_timestamp(t, 0).map(|d| d.format("%Y-%m-%d").to_string()).unwrap_or_default()
}

impl Schedule {
    /// Checks every field; the first bad one is named.
    pub fn check(&self) -> Result<(), FieldError> {
        parse_day("first_day", &self.first_day)?;
        if !(self.completeness.is_finite() && (0.5..=1.0).contains(&self.completeness)) {
            return Err(FieldError::new("completeness", "must be a fraction from 0.5 to 1"));
        }
        self.initial_time()?;
        if self.later_runs.len() > MAX_LATER_RUNS {
            return Err(FieldError::new("later_runs", format!("at most {MAX_LATER_RUNS} later runs")));
        }
        let mut seen = vec![INITIAL];
        for (i, r) in self.later_runs.iter().enumerate() {
            check_kind(&format!("later_runs[{i}].kind"), &r.kind)?;
            if seen.contains(&r.kind.as_str()) {
                return Err(FieldError::new(format!("later_runs[{i}].kind"), format!("{:?} is named twice", r.kind)));
            }
            seen.push(&r.kind);
            if !(1..=MAX_AFTER_DAYS).contains(&r.after_days) {
                return Err(FieldError::new(
                    format!("later_runs[{i}].after_days"),
                    format!("must be from 1 to {MAX_AFTER_DAYS} days"),
                ));
            }
        }
        if !(1..=93).contains(&self.window_days) {
            return Err(FieldError::new("window_days", "must be from 1 to 93 days"));
        }
        Ok(())
    }

    fn initial_time(&self) -> Result<NaiveTime, FieldError> {
        NaiveTime::parse_from_str(&self.initial_by, "%H:%M")
            .map_err(|_| FieldError::new("initial_by", format!("{:?} is not a local time HH:MM", self.initial_by)))
    }

    /// The initial run's deadline for the day starting at `day_start`: the first
    /// moment at or after the day's end when the local clock reads `initial_by`.
    pub fn deadline(&self, tz: Tz, day_start: i64) -> i64 {
        let end = day_start + DAY;
        let at = self.initial_time().unwrap_or(NaiveTime::MIN);
        let date = local_date(tz, end);
        let first = local_at(tz, date, at);
        if first >= end {
            first
        } else {
            local_at(tz, date.checked_add_days(Days::new(1)).unwrap_or(date), at)
        }
    }

    /// When the later run `r` of the day starting at `day_start` is due.
    pub fn later_due(&self, tz: Tz, day_start: i64, r: &LaterRun) -> i64 {
        let deadline = self.deadline(tz, day_start);
        let date = local_date(tz, deadline);
        let at = self.initial_time().unwrap_or(NaiveTime::MIN);
        local_at(tz, date.checked_add_days(Days::new(u64::from(r.after_days))).unwrap_or(date), at)
    }

    /// The UTC days a scheduler considers at `now`: from the first day (or
    /// [`CATCH_UP_DAYS`] back) to the last day that has ended.
    pub fn days_to_consider(&self, now: i64) -> std::ops::Range<i64> {
        let first = parse_day("first_day", &self.first_day).unwrap_or(i64::MAX);
        let last_ended = now.div_euclid(DAY) - 1;
        first.div_euclid(DAY).max(last_ended + 1 - CATCH_UP_DAYS)..last_ended + 1
    }

    /// The runs of one day that are due at `now` and not yet made (`made`
    /// lists the kinds the day has), each with when it was due and what
    /// started it. `completeness` is the fraction of the day's intervals stored.
    pub fn due(&self, tz: Tz, day_start: i64, completeness: f64, readings: bool, made: &[&str], now: i64) -> Vec<Due> {
        let mut out = Vec::new();
        if now < day_start + DAY {
            return out;
        }
        if !made.contains(&INITIAL) {
            let deadline = self.deadline(tz, day_start);
            if completeness >= self.completeness {
                out.push(Due { day_start, kind: INITIAL.into(), due_at: day_start + DAY, started_by: "completeness" });
            } else if now >= deadline && readings {
                out.push(Due { day_start, kind: INITIAL.into(), due_at: deadline, started_by: "deadline" });
            } else {
                // Later runs follow the initial one.
                return out;
            }
        }
        for r in &self.later_runs {
            let due_at = self.later_due(tz, day_start, r);
            if now >= due_at && !made.contains(&r.kind.as_str()) {
                out.push(Due { day_start, kind: r.kind.clone(), due_at, started_by: "schedule" });
            }
        }
        out
    }
}

/// A run that is due.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Due {
    pub day_start: i64,
    pub kind: String,
    pub due_at: i64,
    /// `completeness`, `deadline`, `schedule` (a later run) or `operator`.
    pub started_by: &'static str,
}

fn local_date(tz: Tz, t: i64) -> NaiveDate {
    tz.from_utc_datetime(&DateTime::<Utc>::from_timestamp(t, 0).unwrap_or_default().naive_utc()).date_naive()
}

/// The UTC second at which the local clock reads `at` on `date`: the earlier
/// of two at a clock change back, an hour later when the time is skipped.
fn local_at(tz: Tz, date: NaiveDate, at: NaiveTime) -> i64 {
    let naive = date.and_time(at);
    match tz.from_local_datetime(&naive).earliest() {
        Some(t) => t.timestamp(),
        None => tz
            .from_local_datetime(&(naive + chrono::Duration::hours(1)))
            .earliest()
            .map_or(naive.and_utc().timestamp(), |t| t.timestamp()),
    }
}

/// Where a run's window starts so that it holds one profile version: the
/// first UTC midnight after the last reading (before the settled day) of any
/// version other than the settled day's, or `from` if none. `levels` are a
/// feeder's (meter, interval start, level, profile version) over the window
/// [from, day_start + 1 day). A settled day whose own readings mix versions
/// keeps `from`: its fit then fails and says so.
pub fn one_version_start(levels: &[(String, i64, u8, u32)], from: i64, day_start: i64) -> i64 {
    let mut of_day = levels.iter().filter(|r| r.1 >= day_start).map(|r| r.3);
    let Some(v) = of_day.next() else { return from };
    if of_day.any(|w| w != v) {
        return from;
    }
    match levels.iter().filter(|r| r.3 != v && r.1 < day_start).map(|r| r.1).max() {
        Some(t) => (t - t.rem_euclid(DAY) + DAY).clamp(from, day_start),
        None => from,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn schedule() -> Schedule {
        Schedule {
            first_day: "2026-03-27".into(),
            completeness: 0.98,
            initial_by: "06:00".into(),
            later_runs: vec![
                LaterRun { kind: "interim".into(), after_days: 5 },
                LaterRun { kind: "final".into(), after_days: 14 },
            ],
            window_days: 28,
        }
    }

    #[test]
    fn deadlines_follow_the_local_clock_across_a_clock_change() {
        let s = schedule();
        let tz: Tz = "Europe/London".parse().expect("zone");
        let d = parse_day("d", "2026-03-28").expect("day");
        // The day ends at 00:00 UTC on the 29th (00:00 GMT); UK clocks go
        // forward at 01:00 GMT on the last Sunday of March (the Summer Time
        // Order, from memory; chrono-tz's copy of the IANA tz database agrees,
        // or this fails), so 06:00 local is 05:00 UTC.
        assert_eq!(s.deadline(tz, d), d + DAY + 5 * 3600);
        let before = parse_day("d", "2026-03-27").expect("day");
        assert_eq!(s.deadline(tz, before), before + DAY + 6 * 3600);
        // Five days after the 29th's 06:00 BST, still 05:00 UTC.
        assert_eq!(s.later_due(tz, d, &s.later_runs[0]), d + 6 * DAY + 5 * 3600);
        let ny: Tz = "America/New_York".parse().expect("zone");
        // 00:00 UTC is 20:00 the evening before in New York: 06:00 comes 10 hours later.
        assert_eq!(s.deadline(ny, before), before + DAY + 10 * 3600);
    }

    #[test]
    fn the_initial_run_waits_for_completeness_or_its_deadline_and_later_runs_follow() {
        let s = schedule();
        let tz: Tz = "UTC".parse().expect("zone");
        let d = parse_day("d", "2026-04-01").expect("day");
        assert!(s.due(tz, d, 1.0, true, &[], d + DAY - 1).is_empty(), "the day has not ended");
        let due = s.due(tz, d, 0.99, true, &[], d + DAY + 60);
        assert_eq!(due.len(), 1);
        assert_eq!((due[0].kind.as_str(), due[0].started_by, due[0].due_at), ("initial", "completeness", d + DAY));
        assert!(s.due(tz, d, 0.97, true, &[], d + DAY + 6 * 3600 - 1).is_empty());
        let due = s.due(tz, d, 0.97, true, &[], d + DAY + 6 * 3600);
        assert_eq!((due[0].started_by, due[0].due_at), ("deadline", d + DAY + 6 * 3600));
        assert!(s.due(tz, d, 0.0, false, &[], d + 3 * DAY).is_empty(), "a day without a reading waits");
        // Catch-up: a scheduler that was down for three weeks owes every run at once.
        let due = s.due(tz, d, 0.5, true, &[], d + 22 * DAY);
        let kinds: Vec<(&str, i64)> = due.iter().map(|r| (r.kind.as_str(), r.due_at)).collect();
        let six = d + DAY + 6 * 3600;
        assert_eq!(kinds, vec![("initial", six), ("interim", six + 5 * DAY), ("final", six + 14 * DAY)]);
        let due = s.due(tz, d, 0.5, true, &["initial", "final"], d + 22 * DAY);
        assert_eq!(due.iter().map(|r| r.kind.as_str()).collect::<Vec<_>>(), vec!["interim"]);
        assert!(s.due(tz, d, 1.0, true, &["initial", "interim", "final"], d + 99 * DAY).is_empty());
    }

    #[test]
    fn bad_schedules_name_their_field() {
        type Spoil = Box<dyn Fn(&mut Schedule)>;
        let cases: Vec<(Spoil, &str)> = vec![
            (Box::new(|s| s.first_day = "2026-02-30".into()), "first_day"),
            (Box::new(|s| s.completeness = 0.2), "completeness"),
            (Box::new(|s| s.completeness = f64::NAN), "completeness"),
            (Box::new(|s| s.initial_by = "25:00".into()), "initial_by"),
            (Box::new(|s| s.later_runs[1].kind = "interim".into()), "later_runs[1].kind"),
            (Box::new(|s| s.later_runs[0].kind = "initial".into()), "later_runs[0].kind"),
            (Box::new(|s| s.later_runs[0].kind = "Final Run".into()), "later_runs[0].kind"),
            (Box::new(|s| s.later_runs[1].after_days = 0), "later_runs[1].after_days"),
            (Box::new(|s| s.window_days = 120), "window_days"),
        ];
        for (bad, field) in cases {
            let mut s = schedule();
            bad(&mut s);
            assert_eq!(s.check().map_err(|e| e.field), Err(field.to_owned()), "{s:?}");
        }
        assert_eq!(schedule().check(), Ok(()));
        let s = schedule();
        let d = parse_day("d", &s.first_day).expect("day");
        assert_eq!(s.days_to_consider(d + 3 * DAY + 5), d / DAY..d / DAY + 3);
        assert!(s.days_to_consider(d + 5).is_empty());
    }

    #[test]
    fn a_window_starts_after_the_last_reading_of_another_profile_version() {
        let r = |t: i64, v: u32| ("M-1".to_owned(), t, 0u8, v);
        let (from, day) = (10 * DAY, 14 * DAY);
        // Version 2 from day 12, 06:00: the window starts on day 13.
        let levels = vec![r(from, 1), r(12 * DAY + 5 * 3600, 1), r(12 * DAY + 6 * 3600, 2), r(day + 900, 2)];
        assert_eq!(one_version_start(&levels, from, day), 13 * DAY);
        // One version throughout, or a settled day that mixes two: unchanged.
        assert_eq!(one_version_start(&levels[2..], from, day), from);
        let mixed = vec![r(from, 1), r(day, 1), r(day + 900, 2)];
        assert_eq!(one_version_start(&mixed, from, day), from);
        // A change during the day before: the window is the settled day alone.
        let late = vec![r(from, 1), r(day - 900, 1), r(day, 2)];
        assert_eq!(one_version_start(&late, from, day), day);
        assert_eq!(one_version_start(&[], from, day), from);
    }
}
