//! Tariff calendars: time-of-use bands by local time of day and day type, a
//! list of holidays (which take the holiday rules), and monthly billing
//! periods from a day of the month. Every interval is assigned by its start's
//! local time. A calendar is refused unless, for each day type, its rules
//! cover the whole day exactly once.
//!
//! The file (README, "Tariff calendars"):
//! ```json
//! { "name": "two-rate", "time_zone": "Europe/Dublin", "billing_day": 1,
//!   "bands": [ { "band": "day", "days": ["mon","tue","wed","thu","fri"], "from": "07:00", "to": "23:00" },
//!              { "band": "night", "days": ["mon","tue","wed","thu","fri"], "from": "23:00", "to": "07:00" },
//!              { "band": "night", "days": ["sat","sun","holiday"], "from": "00:00", "to": "24:00" } ],
//!   "holidays": ["2023-01-02"] }
//! ```

use std::collections::BTreeSet;

use chrono::{Datelike, Months, NaiveDate, TimeZone, Timelike};
use chrono_tz::Tz;
use serde::Deserialize;
use serde_json::value::RawValue;

use crate::FieldError;

/// At most this many rules, distinct bands and holidays in one calendar.
pub const MAX_RULES: usize = 64;
pub const MAX_BANDS: usize = 16;
pub const MAX_HOLIDAYS: usize = 5000;

/// The day types a rule names: the weekdays, then "holiday".
const DAY_TYPES: [&str; 8] = ["mon", "tue", "wed", "thu", "fri", "sat", "sun", "holiday"];
const MINUTES: usize = 1440;

/// A calendar refused: the file's line and the field, with the reason.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("line {line}: {}: {}", error.field, error.reason)]
pub struct CalendarError {
    pub line: usize,
    pub error: FieldError,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct CalendarFile<'a> {
    name: String,
    time_zone: String,
    billing_day: u32,
    #[serde(borrow)]
    bands: Vec<&'a RawValue>,
    #[serde(default, borrow)]
    holidays: Vec<&'a RawValue>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RuleFile {
    band: String,
    days: Vec<String>,
    from: String,
    to: String,
}

/// A checked tariff calendar.
#[derive(Debug, Clone, PartialEq)]
pub struct TariffCalendar {
    pub name: String,
    pub zone: Tz,
    pub billing_day: u32,
    /// The band names, in the order the file first names them.
    pub bands: Vec<String>,
    /// Band index per day type and minute of the day.
    table: Vec<u8>,
    holidays: BTreeSet<NaiveDate>,
}

/// "HH:MM" as minutes of the day; "24:00" only where `end`.
fn minutes(text: &str, end: bool) -> Option<usize> {
    let (h, m) = text.split_once(':')?;
    if h.len() != 2 || m.len() != 2 {
        return None;
    }
    let (h, m): (usize, usize) = (h.parse().ok()?, m.parse().ok()?);
    let total = h * 60 + m;
    (m < 60 && (total < MINUTES || (end && total == MINUTES))).then_some(total)
}

fn clock(minute: usize) -> String {
    format!("{:02}:{:02}", minute / 60, minute % 60)
}

/// The holiday list: each a distinct "YYYY-MM-DD".
fn parse_holidays(
    raws: &[&RawValue],
    line_of: &dyn Fn(&RawValue) -> usize,
) -> Result<BTreeSet<NaiveDate>, CalendarError> {
    let mut holidays = BTreeSet::new();
    if raws.len() > MAX_HOLIDAYS {
        return Err(CalendarError {
            line: 1,
            error: FieldError::new("holidays", format!("more than {MAX_HOLIDAYS} holidays")),
        });
    }
    for (k, raw) in raws.iter().enumerate() {
        let bad = |reason: String| CalendarError {
            line: line_of(raw),
            error: FieldError::new(format!("holidays[{k}]"), reason),
        };
        let date = serde_json::from_str::<String>(raw.get())
            .ok()
            .and_then(|s| NaiveDate::parse_from_str(&s, "%Y-%m-%d").ok())
            .ok_or_else(|| bad(format!("{} is not a date \"YYYY-MM-DD\"", raw.get())))?;
        if !holidays.insert(date) {
            return Err(bad(format!("{date} is listed twice")));
        }
    }
    Ok(holidays)
}

/// The first stretch of a day type that no rule covers, described.
fn first_gap(owner: &[Option<usize>]) -> Option<String> {
    DAY_TYPES.iter().enumerate().find_map(|(t, day)| {
        let start = (0..MINUTES).find(|&m| owner[t * MINUTES + m].is_none())?;
        let end = (start..MINUTES).find(|&m| owner[t * MINUTES + m].is_some()).unwrap_or(MINUTES);
        Some(format!("no band covers {day} from {} to {}", clock(start), clock(end)))
    })
}

impl TariffCalendar {
    /// Parses and checks a calendar file's text.
    pub fn parse(text: &str) -> Result<Self, CalendarError> {
        let line_of = |raw: &RawValue| {
            let offset = (raw.get().as_ptr() as usize).saturating_sub(text.as_ptr() as usize).min(text.len());
            text[..offset].matches('\n').count() + 1
        };
        let file: CalendarFile<'_> = serde_json::from_str(text)
            .map_err(|e| CalendarError { line: e.line(), error: FieldError::new("calendar", e.to_string()) })?;
        let top = |field: &str, reason: String| CalendarError { line: 1, error: FieldError::new(field, reason) };
        let name = file.name.trim().to_owned();
        if name.is_empty() || name.chars().count() > 64 || name.chars().any(char::is_control) {
            return Err(top("name", "must be 1 to 64 printable characters".into()));
        }
        let zone: Tz = file
            .time_zone
            .parse()
            .map_err(|_| top("time_zone", format!("{:?} is not an IANA time zone", file.time_zone)))?;
        if !(1..=28).contains(&file.billing_day) {
            return Err(top("billing_day", format!("{} is not a day of the month from 1 to 28", file.billing_day)));
        }
        if file.bands.is_empty() || file.bands.len() > MAX_RULES {
            return Err(top("bands", format!("must hold 1 to {MAX_RULES} rules")));
        }
        let mut bands: Vec<String> = Vec::new();
        // Which rule owns each day type's minute.
        let mut owner: Vec<Option<usize>> = vec![None; DAY_TYPES.len() * MINUTES];
        let mut table = vec![0u8; DAY_TYPES.len() * MINUTES];
        for (k, raw) in file.bands.iter().enumerate() {
            let line = line_of(raw);
            let bad = |field: &str, reason: String| CalendarError {
                line,
                error: FieldError::new(format!("bands[{k}].{field}"), reason),
            };
            let rule: RuleFile = serde_json::from_str(raw.get()).map_err(|e| CalendarError {
                line: line + e.line() - 1,
                error: FieldError::new(format!("bands[{k}]"), e.to_string()),
            })?;
            let band = rule.band.trim();
            if band.is_empty() || band.chars().count() > 32 || band.chars().any(char::is_control) {
                return Err(bad("band", "must be 1 to 32 printable characters".into()));
            }
            let index = match bands.iter().position(|b| b == band) {
                Some(i) => i,
                None if bands.len() < MAX_BANDS => {
                    bands.push(band.to_owned());
                    bands.len() - 1
                }
                None => return Err(bad("band", format!("more than {MAX_BANDS} distinct bands"))),
            };
            let from = minutes(&rule.from, false)
                .ok_or_else(|| bad("from", format!("{:?} is not a time HH:MM from 00:00 to 23:59", rule.from)))?;
            let to = minutes(&rule.to, true)
                .ok_or_else(|| bad("to", format!("{:?} is not a time HH:MM from 00:00 to 24:00", rule.to)))?;
            if from == to {
                return Err(bad("to", "equals from; a band for the whole day runs from 00:00 to 24:00".into()));
            }
            if rule.days.is_empty() {
                return Err(bad("days", "names no day type".into()));
            }
            let span: Vec<usize> =
                if from < to { (from..to).collect() } else { (from..MINUTES).chain(0..to).collect() };
            for day in &rule.days {
                let Some(t) = DAY_TYPES.iter().position(|d| d == day) else {
                    return Err(bad("days", format!("{day:?} is not one of {}", DAY_TYPES.join(", "))));
                };
                for &minute in &span {
                    if let Some(other) = owner[t * MINUTES + minute] {
                        let reason = format!(
                            "overlaps bands[{other}] ({}) on {day} at {}",
                            bands[usize::from(table[t * MINUTES + minute])],
                            clock(minute)
                        );
                        return Err(bad("from", reason));
                    }
                    owner[t * MINUTES + minute] = Some(k);
                    table[t * MINUTES + minute] = index as u8;
                }
            }
        }
        if let Some(reason) = first_gap(&owner) {
            return Err(CalendarError { line: line_of(file.bands[0]), error: FieldError::new("bands", reason) });
        }
        let holidays = parse_holidays(&file.holidays, &line_of)?;
        Ok(Self { name, zone, billing_day: file.billing_day, bands, table, holidays })
    }

    /// The band of the interval starting at `t` (UTC epoch seconds).
    pub fn band_at(&self, t: i64) -> usize {
        let local = self.zone.timestamp_opt(t, 0).single().map_or_else(
            || chrono::DateTime::from_timestamp(t, 0).unwrap_or_default().naive_utc(),
            |d| d.naive_local(),
        );
        let day = if self.holidays.contains(&local.date()) {
            DAY_TYPES.len() - 1
        } else {
            local.weekday().num_days_from_monday() as usize
        };
        usize::from(self.table[day * MINUTES + local.hour() as usize * 60 + local.minute() as usize])
    }

    /// The first local day of the billing period holding `t`.
    pub fn period_at(&self, t: i64) -> NaiveDate {
        let local = self.zone.timestamp_opt(t, 0).single().map_or_else(
            || chrono::DateTime::from_timestamp(t, 0).unwrap_or_default().naive_utc(),
            |d| d.naive_local(),
        );
        let date = local.date();
        let this = date.with_day(self.billing_day).unwrap_or(date);
        if date >= this {
            this
        } else {
            this.checked_sub_months(Months::new(1)).unwrap_or(this)
        }
    }

    /// The day after a billing period that starts on `start` ends.
    pub fn period_end(&self, start: NaiveDate) -> NaiveDate {
        start.checked_add_months(Months::new(1)).unwrap_or(start)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const TWO_RATE: &str = r#"{
  "name": "two-rate",
  "time_zone": "Europe/Dublin",
  "billing_day": 5,
  "bands": [
    { "band": "day", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "07:00", "to": "23:00" },
    { "band": "night", "days": ["mon", "tue", "wed", "thu", "fri"], "from": "23:00", "to": "07:00" },
    { "band": "night", "days": ["sat", "sun", "holiday"], "from": "00:00", "to": "24:00" }
  ],
  "holidays": ["2023-01-02"]
}"#;

    #[test]
    fn bands_follow_local_time_day_type_and_holidays() {
        let c = TariffCalendar::parse(TWO_RATE).unwrap();
        assert_eq!(c.bands, ["day", "night"]);
        // 2023-01-03 (Tuesday) 08:00 in Dublin is 08:00 UTC in winter; 2023-07-04 08:00 is 07:00 UTC.
        assert_eq!(c.bands[c.band_at(1_672_732_800)], "day");
        assert_eq!(c.bands[c.band_at(1_688_454_000)], "day");
        assert_eq!(c.bands[c.band_at(1_688_454_000 - 3601)], "night");
        // 2023-01-02 is a Monday but listed as a holiday.
        assert_eq!(c.bands[c.band_at(1_672_732_800 - 86_400)], "night");
        // Billing from the 5th: 2023-01-03 is in the period from 2022-12-05.
        let start = c.period_at(1_672_732_800);
        assert_eq!(start.to_string(), "2022-12-05");
        assert_eq!(c.period_end(start).to_string(), "2023-01-05");
    }

    #[test]
    fn overlaps_gaps_and_bad_fields_name_their_line_and_field() {
        let overlap = TWO_RATE.replace(r#""from": "23:00", "to": "07:00""#, r#""from": "22:00", "to": "07:00""#);
        let e = TariffCalendar::parse(&overlap).unwrap_err();
        assert_eq!((e.line, e.error.field.as_str()), (7, "bands[1].from"), "{e}");
        assert!(e.error.reason.contains("overlaps bands[0] (day) on mon at 22:00"), "{e}");
        let gap = TWO_RATE.replace(r#""from": "23:00", "to": "07:00""#, r#""from": "23:30", "to": "07:00""#);
        let e = TariffCalendar::parse(&gap).unwrap_err();
        assert_eq!(e.error.field, "bands", "{e}");
        assert!(e.error.reason.contains("no band covers mon from 23:00 to 23:30"), "{e}");
        let e = TariffCalendar::parse(&TWO_RATE.replace("\"sat\"", "\"saturday\"")).unwrap_err();
        assert_eq!((e.line, e.error.field.as_str()), (8, "bands[2].days"), "{e}");
        let e = TariffCalendar::parse(&TWO_RATE.replace("2023-01-02", "2023-02-30")).unwrap_err();
        assert_eq!((e.line, e.error.field.as_str()), (10, "holidays[0]"), "{e}");
        let e = TariffCalendar::parse(&TWO_RATE.replace("Europe/Dublin", "Europe/Nowhere")).unwrap_err();
        assert_eq!(e.error.field, "time_zone", "{e}");
        let e = TariffCalendar::parse(&TWO_RATE.replace("\"billing_day\": 5", "\"billing_day\": 31")).unwrap_err();
        assert_eq!(e.error.field, "billing_day", "{e}");
        let e = TariffCalendar::parse(&TWO_RATE.replace("\"to\": \"23:00\"", "\"to\": \"23:60\"")).unwrap_err();
        assert_eq!((e.line, e.error.field.as_str()), (6, "bands[0].to"), "{e}");
    }
}
