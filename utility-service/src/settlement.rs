//! Settlement outputs of a finished recovery: daily energies reconciled to
//! register reads, per-interval CSV in UTC and the feeder's local time, and the
//! open-standard NAESB REQ.21 ESPI XML (an Atom feed of IntervalBlocks).
//!
//! Settlement days are the register reads' days (UTC midnight to UTC midnight),
//! so that a day's energy can equal its register advance exactly. The interval
//! CSV labels every interval by its local ending time as well, for local
//! aggregation; a local day then has 92 or 100 quarter-hours at the DST changes.

use std::collections::HashMap;
use std::fmt::Write as _;

use chrono::{DateTime, SecondsFormat, TimeZone, Utc};
use chrono_tz::Tz;
use serde::{Deserialize, Serialize};

use meterveil_shared::aggregate::Z95;
use meterveil_shared::energies::EnergyCell;
use meterveil_shared::recovery::{LevelMatrix, SumConstraint};

use crate::records::RecoveredRow;

/// One meter-day of settlement (also as frozen into a settlement run).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct DailyEnergy {
    pub meter_id: String,
    /// UTC epoch second of the day's start (a UTC midnight).
    pub day_start: i64,
    /// ISO 8601 date of that UTC day.
    pub day: String,
    /// Settled energy: the day's register advance where one exists (daily
    /// reads), otherwise the levels' estimate of the day's energy
    /// (`shared::energies::meter_energies`, which under weekly or monthly
    /// reads sums to the period's advance). That estimate is not the sum of
    /// the recovered intervals (`recovered_wh`): on the reference populations
    /// it was the closer of the two (README "Group loads and their bands").
    /// Without it (a recovery whose meters changed since) the recovered sum.
    pub energy_wh: f64,
    /// The 95% band of `energy_wh` from its levels and the recovery's
    /// bootstrap: the register advance itself for a register day; `None`
    /// where the levels' estimate could not be had.
    #[serde(default)]
    pub low_wh: Option<f64>,
    #[serde(default)]
    pub high_wh: Option<f64>,
    /// The band's upper half-width over 1.96, as a standard deviation: 0 for
    /// a register advance. (Runs frozen before the bands were trusted hold
    /// the intervals' first-order bands combined as independent here, an
    /// understatement, and no `low_wh` or `high_wh`.)
    #[serde(default)]
    pub uncertainty_wh: Option<f64>,
    pub source: String,
    /// ESPI QualityOfReading of `energy_wh`: 0 (valid, a register advance) or
    /// 11 (derived, from the recovery); the code values are from memory of the
    /// NAESB REQ.21 QualityOfReading list, as in `espi_quality`.
    pub quality: u16,
    pub recovered_wh: f64,
    pub register_wh: Option<i64>,
    pub intervals: usize,
    pub derived: usize,
    pub estimated: usize,
    pub corrected: usize,
    /// Readings left out as loads the population's shape does not hold.
    pub atypical: usize,
}

fn utc_date(t: i64) -> String {
    DateTime::<Utc>::from_timestamp(t, 0).map(|d| d.format("%Y-%m-%d").to_string()).unwrap_or_default()
}

/// A stored register advance: the exact energy (Wh) a meter's gateway forwarded
/// over the register period [period_start, read_at).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Advance {
    pub meter_id: String,
    pub period_start: i64,
    pub read_at: i64,
    pub wh: i64,
}

/// Register advances whose period lies inside the window (a day, or any longer
/// period), for meters with every interval of the period stored: then the
/// gateway's count of forwarded intervals and the period's intervals coincide.
pub fn register_constraints(
    meters: &HashMap<String, usize>,
    levels: &LevelMatrix,
    reads: &[Advance],
    from: i64,
    interval_s: u32,
) -> Vec<SumConstraint> {
    let step = i64::from(interval_s);
    let mut out = Vec::new();
    for a in reads {
        if a.period_start < from || (a.period_start - from) % step != 0 || (a.read_at - a.period_start) % step != 0 {
            continue;
        }
        let Some(&row) = meters.get(&a.meter_id) else { continue };
        let first = ((a.period_start - from) / step) as usize;
        let cols = first..((a.read_at - from) / step) as usize;
        let wh = a.wh;
        if cols.end > levels.cols() || cols.clone().any(|j| levels.get(row, j).is_none()) {
            continue;
        }
        out.push(SumConstraint::from_wh(row, cols, wh as f64, interval_s));
    }
    out.sort_by_key(|c| (c.row, c.cols.start));
    out
}

/// Daily advances per (meter, UTC day start): those whose period is one UTC day.
pub fn daily_advances(reads: &[Advance]) -> HashMap<(String, i64), i64> {
    reads
        .iter()
        .filter(|a| a.period_start.rem_euclid(86_400) == 0 && a.read_at - a.period_start == 86_400)
        .map(|a| ((a.meter_id.clone(), a.period_start), a.wh))
        .collect()
}

/// Each meter-day's energy from its levels and its 95% band (Wh: estimate,
/// low, high), from the levels and the recovery's bootstrap, by (meter, UTC
/// day start).
pub type DayEstimates = HashMap<(String, i64), (f64, f64, f64)>;

/// [`DayEstimates`] from a recovery's energies per UTC day
/// (`shared::energies::meter_energies` with `day_label(None)`), whose
/// `meter` indexes `meters`.
pub fn day_estimates(cells: &[EnergyCell], meters: &[String]) -> DayEstimates {
    cells
        .iter()
        .filter_map(|c| {
            let start = c.label.0.and_hms_opt(0, 0, 0)?.and_utc().timestamp();
            let wh = (c.kwh * 1000.0, c.kwh_low * 1000.0, c.kwh_high * 1000.0);
            Some(((meters.get(c.meter)?.clone(), start), wh))
        })
        .collect()
}

/// Daily energies of every meter over the whole UTC days the rows cover, each
/// recovered day at its levels' estimate from `estimates` where it has one.
/// `rows` are ordered by meter and time.
pub fn daily(rows: &[RecoveredRow], reads: &[Advance], interval_s: u32, estimates: &DayEstimates) -> Vec<DailyEnergy> {
    let per_day = (86_400 / interval_s.max(1)) as usize;
    let wh_per_kw = f64::from(interval_s) / 3.6;
    let advances = daily_advances(reads);
    let mut groups: Vec<((String, i64), Vec<&RecoveredRow>)> = Vec::new();
    for r in rows {
        let key = (r.meter_id.clone(), r.interval_start - r.interval_start.rem_euclid(86_400));
        match groups.last_mut() {
            Some((k, v)) if *k == key => v.push(r),
            _ => groups.push((key, vec![r])),
        }
    }
    groups
        .into_iter()
        .filter(|(_, v)| v.len() == per_day)
        .map(|((meter, day), v)| {
            let recovered: f64 = v.iter().map(|r| r.kw * wh_per_kw).sum();
            let count = |f: &str| v.iter().filter(|r| r.flag == f).count();
            let reg = advances.get(&(meter.clone(), day)).copied();
            let (energy, band) = match (reg, estimates.get(&(meter.clone(), day))) {
                (Some(w), _) => (w as f64, Some((w as f64, w as f64))),
                (None, Some(&(e, lo, hi))) => (e, Some((lo, hi))),
                (None, None) => (recovered, None),
            };
            DailyEnergy {
                day: utc_date(day),
                day_start: day,
                energy_wh: energy,
                low_wh: band.map(|b| b.0),
                high_wh: band.map(|b| b.1),
                uncertainty_wh: band.map(|b| (b.1 - energy) / Z95),
                source: if reg.is_some() { "register" } else { "recovered" }.into(),
                quality: if reg.is_some() { 0 } else { 11 },
                recovered_wh: recovered,
                register_wh: reg,
                intervals: v.len(),
                derived: count("derived"),
                estimated: count("estimated"),
                corrected: count("corrected"),
                atypical: count("atypical"),
                meter_id: meter,
            }
        })
        .collect()
}

/// How one meter-day's energy moved from an earlier run to a later one.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct DayChange {
    pub meter_id: String,
    pub day_start: i64,
    pub day: String,
    /// Each run's own energy for the day (its recovered sum, which equals a
    /// daily register advance where the run had one).
    pub earlier_wh: f64,
    pub later_wh: f64,
    pub change_wh: f64,
    /// Intervals with a reading in each run.
    pub earlier_readings: usize,
    pub later_readings: usize,
    /// Why it moved: `new readings`, `fewer readings`, `register read` (the
    /// later run met a daily read the earlier did not), `profile version`,
    /// `refit` (none of these: the population's shape was fitted anew), or
    /// `unchanged` (within half a watt-hour).
    pub reasons: Vec<&'static str>,
}

/// The meter-days both runs hold, each with its change and the reasons.
/// `profile_changed`: the runs recovered different profile versions.
pub fn compare_days(earlier: &[DailyEnergy], later: &[DailyEnergy], profile_changed: bool) -> Vec<DayChange> {
    let before: HashMap<(&str, i64), &DailyEnergy> =
        earlier.iter().map(|d| ((d.meter_id.as_str(), d.day_start), d)).collect();
    later
        .iter()
        .filter_map(|b| {
            let a = before.get(&(b.meter_id.as_str(), b.day_start))?;
            let (ra, rb) = (a.intervals - a.estimated, b.intervals - b.estimated);
            let change = b.recovered_wh - a.recovered_wh;
            let mut reasons = Vec::new();
            if rb > ra {
                reasons.push("new readings");
            } else if rb < ra {
                reasons.push("fewer readings");
            }
            let meets = |d: &DailyEnergy| b.register_wh.is_some_and(|w| (d.recovered_wh - w as f64).abs() <= 1.0);
            if meets(b) && !meets(a) {
                reasons.push("register read");
            }
            if profile_changed {
                reasons.push("profile version");
            }
            if reasons.is_empty() {
                reasons.push(if change.abs() <= 0.5 { "unchanged" } else { "refit" });
            }
            Some(DayChange {
                meter_id: b.meter_id.clone(),
                day_start: b.day_start,
                day: b.day.clone(),
                earlier_wh: a.recovered_wh,
                later_wh: b.recovered_wh,
                change_wh: change,
                earlier_readings: ra,
                later_readings: rb,
                reasons,
            })
        })
        .collect()
}

/// A comparison's counts per reason, and the median relative move of the
/// meter-days that gained nothing (reasons `refit` or `unchanged` only).
pub fn comparison_summary(changes: &[DayChange]) -> (std::collections::BTreeMap<&'static str, usize>, Option<f64>) {
    let mut reasons: std::collections::BTreeMap<&str, usize> = Default::default();
    for c in changes {
        for r in &c.reasons {
            *reasons.entry(r).or_default() += 1;
        }
    }
    let mut quiet: Vec<f64> = changes
        .iter()
        .filter(|c| c.reasons.iter().all(|r| ["refit", "unchanged"].contains(r)))
        .map(|c| (c.change_wh / c.earlier_wh.max(1.0)).abs())
        .collect();
    quiet.sort_by(f64::total_cmp);
    (reasons, quiet.get(quiet.len() / 2).copied())
}

pub fn daily_csv(days: &[DailyEnergy]) -> String {
    let mut out = String::from(
        "meter_id,day_start,day,energy_wh,low_wh,high_wh,uncertainty_wh,source,quality,recovered_wh,register_wh,intervals,derived,estimated,corrected,atypical\n",
    );
    let opt = |v: Option<f64>| v.map(|w| format!("{w:.1}")).unwrap_or_default();
    for d in days {
        let _ = writeln!(
            out,
            "{},{},{},{:.1},{},{},{},{},{},{:.1},{},{},{},{},{},{}",
            d.meter_id,
            d.day_start,
            d.day,
            d.energy_wh,
            opt(d.low_wh),
            opt(d.high_wh),
            opt(d.uncertainty_wh),
            d.source,
            d.quality,
            d.recovered_wh,
            d.register_wh.map(|w| w.to_string()).unwrap_or_default(),
            d.intervals,
            d.derived,
            d.estimated,
            d.corrected,
            d.atypical
        );
    }
    out
}

fn local(tz: Tz, t: i64) -> DateTime<Tz> {
    tz.from_utc_datetime(&DateTime::<Utc>::from_timestamp(t, 0).unwrap_or_default().naive_utc())
}

/// Per-interval CSV: UTC start, the local ending time as ISO 8601 with its
/// offset (the interval-ending label), the local date the interval belongs to
/// (that of its start), energy and the recovery's figures.
pub fn interval_csv(rows: &[RecoveredRow], tz: Tz, interval_s: u32) -> String {
    let wh_per_kw = f64::from(interval_s) / 3.6;
    let mut out = String::from("meter_id,interval_start,interval_end_local,local_date,wh,kw,flag,kw_low,kw_high\n");
    for r in rows {
        let end = local(tz, r.interval_start + i64::from(interval_s));
        let start = local(tz, r.interval_start);
        let _ = writeln!(
            out,
            "{},{},{},{},{:.1},{:.4},{},{:.4},{:.4}",
            r.meter_id,
            r.interval_start,
            end.to_rfc3339_opts(SecondsFormat::Secs, false),
            start.format("%Y-%m-%d"),
            r.kw * wh_per_kw,
            r.kw,
            r.flag,
            r.kw_low,
            r.kw_high
        );
    }
    out
}

/// ESPI quality codes (QualityOfReading) of a recovery flag: `derived` → 11
/// (calculated), `estimated` (no reading) → 8 (machine estimate from historical
/// data), `corrected` (reading judged corrupt and replaced) → 10 (failed a check)
/// and 8, `atypical` (a genuine reading the fit left out; the value is the
/// population's estimate, the reading was not judged wrong) → 8 alone.
pub fn espi_quality(flag: &str) -> &'static [u16] {
    match flag {
        "derived" => &[11],
        "corrected" => &[10, 8],
        _ => &[8],
    }
}

fn xml_escape(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// An Atom feed holding one ESPI ReadingType (energy, mWh, forward, delta data)
/// and one IntervalBlock per meter and UTC day, values in milliwatt-hours.
pub fn espi_feed(rows: &[RecoveredRow], feed: (&str, &str), base_href: &str, interval_s: u32, now: i64) -> String {
    let (feed_id, title) = feed;
    let updated =
        DateTime::<Utc>::from_timestamp(now, 0).unwrap_or_default().to_rfc3339_opts(SecondsFormat::Secs, true);
    let mwh_per_kw = f64::from(interval_s) / 3.6 * 1000.0;
    let href = xml_escape(base_href);
    let mut x = String::with_capacity(rows.len() * 220 + 2000);
    let _ = write!(
        x,
        "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n<feed xmlns=\"http://www.w3.org/2005/Atom\" xmlns:espi=\"http://naesb.org/espi\">\n\
         <id>{id}</id>\n<title>{title}</title>\n<updated>{updated}</updated>\n<link rel=\"self\" href=\"{href}\"/>\n\
         <entry>\n<id>{id}/reading-type</id>\n<title>Energy delivered, mWh per interval</title>\n<published>{updated}</published>\n\
         <updated>{updated}</updated>\n<link rel=\"self\" href=\"{href}#reading-type\"/>\n<link rel=\"up\" href=\"{href}\"/>\n\
         <content><espi:ReadingType><espi:accumulationBehaviour>4</espi:accumulationBehaviour><espi:commodity>1</espi:commodity>\
         <espi:defaultQuality>11</espi:defaultQuality><espi:flowDirection>1</espi:flowDirection><espi:intervalLength>{interval_s}</espi:intervalLength>\
         <espi:kind>12</espi:kind><espi:powerOfTenMultiplier>-3</espi:powerOfTenMultiplier><espi:uom>72</espi:uom></espi:ReadingType></content>\n</entry>\n",
        id = xml_escape(feed_id),
        title = xml_escape(title),
    );
    let mut i = 0;
    while i < rows.len() {
        let meter = &rows[i].meter_id;
        let day = rows[i].interval_start - rows[i].interval_start.rem_euclid(86_400);
        let mut j = i;
        while j < rows.len() && rows[j].meter_id == *meter && rows[j].interval_start < day + 86_400 {
            j += 1;
        }
        let m = xml_escape(meter);
        let _ = write!(
            x,
            "<entry>\n<id>{id}/{m}/{day}</id>\n<title>{m} {date}</title>\n<published>{updated}</published>\n<updated>{updated}</updated>\n\
             <link rel=\"self\" href=\"{href}#{m}-{day}\"/>\n<link rel=\"up\" href=\"{href}#reading-type\"/>\n\
             <content><espi:IntervalBlock><espi:interval><espi:duration>{dur}</espi:duration><espi:start>{day}</espi:start></espi:interval>",
            id = xml_escape(feed_id),
            date = utc_date(day),
            dur = (rows[j - 1].interval_start + i64::from(interval_s) - rows[i].interval_start),
        );
        for r in &rows[i..j] {
            x.push_str("<espi:IntervalReading>");
            for q in espi_quality(r.flag) {
                let _ = write!(x, "<espi:ReadingQuality><espi:quality>{q}</espi:quality></espi:ReadingQuality>");
            }
            let _ = write!(
                x,
                "<espi:timePeriod><espi:duration>{interval_s}</espi:duration><espi:start>{}</espi:start></espi:timePeriod><espi:value>{}</espi:value></espi:IntervalReading>",
                r.interval_start,
                (r.kw * mwh_per_kw).round() as i64
            );
        }
        x.push_str("</espi:IntervalBlock></content>\n</entry>\n");
        i = j;
    }
    x.push_str("</feed>\n");
    x
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_comparison_names_why_each_day_moved() {
        let day = |meter: &str, start: i64, wh: f64, estimated: usize, reg: Option<i64>| DailyEnergy {
            meter_id: meter.into(),
            day_start: start,
            day: utc_date(start),
            energy_wh: reg.map_or(wh, |w| w as f64),
            low_wh: None,
            high_wh: None,
            uncertainty_wh: None,
            source: "recovered".into(),
            quality: 11,
            recovered_wh: wh,
            register_wh: reg,
            intervals: 96,
            derived: 96 - estimated,
            estimated,
            corrected: 0,
            atypical: 0,
        };
        let earlier = vec![
            day("A", 0, 5000.0, 10, None),
            day("A", 86_400, 5000.0, 0, Some(6000)),
            day("A", 172_800, 5000.0, 0, None),
            day("A", 259_200, 5000.0, 0, None),
        ];
        let later = vec![
            day("A", 0, 5400.0, 0, None),            // late readings arrived
            day("A", 86_400, 6000.0, 0, Some(6000)), // the read was met this time
            day("A", 172_800, 5000.2, 0, None),      // nothing new, within 0.5 Wh
            day("A", 259_200, 5100.0, 0, None),      // nothing new, refitted
            day("A", 345_600, 5100.0, 0, None),      // the earlier run did not hold it
        ];
        let c = compare_days(&earlier, &later, false);
        let reasons: Vec<&[&str]> = c.iter().map(|d| d.reasons.as_slice()).collect();
        assert_eq!(reasons, vec![&["new readings"][..], &["register read"], &["unchanged"], &["refit"]]);
        assert_eq!((c[0].earlier_readings, c[0].later_readings, c[0].change_wh), (86, 96, 400.0));
        assert!(compare_days(&earlier, &later, true).iter().all(|d| d.reasons.contains(&"profile version")));
    }

    fn rows(meter: &str, from: i64, to: i64, kw: f64) -> Vec<RecoveredRow> {
        (from..to)
            .step_by(900)
            .map(|t| RecoveredRow {
                meter_id: meter.into(),
                interval_start: t,
                kw,
                flag: "derived",
                kw_low: kw - 0.1,
                kw_high: kw + 0.1,
            })
            .collect()
    }

    fn per_local_date(csv: &str) -> std::collections::BTreeMap<String, usize> {
        let mut m = std::collections::BTreeMap::new();
        for l in csv.lines().skip(1) {
            *m.entry(l.split(',').nth(3).unwrap_or("").to_owned()).or_insert(0) += 1;
        }
        m
    }

    /// British Summer Time 2026 starts on Sunday 29 March at 01:00 UTC and ends on
    /// Sunday 25 October at 01:00 UTC (UK rule: last Sunday of March and October,
    /// at 01:00 GMT; common practice, from the published rule).
    #[test]
    fn local_days_have_92_and_100_quarter_hours_at_the_clock_changes() {
        let tz: Tz = "Europe/London".parse().unwrap();
        // 2026-03-28 00:00 UTC = 00:00 GMT; three local days.
        let spring = 1_774_656_000;
        let csv = interval_csv(&rows("M-1", spring, spring + 3 * 86_400 - 3600, 1.0), tz, 900);
        let days = per_local_date(&csv);
        assert_eq!(days.get("2026-03-28"), Some(&96));
        assert_eq!(days.get("2026-03-29"), Some(&92), "{days:?}");
        // 2026-10-24 00:00 BST = 2026-10-23 23:00 UTC.
        let autumn = 1_792_796_400;
        let csv = interval_csv(&rows("M-1", autumn, autumn + 3 * 86_400 + 3600, 1.0), tz, 900);
        let days = per_local_date(&csv);
        assert_eq!(days.get("2026-10-24"), Some(&96));
        assert_eq!(days.get("2026-10-25"), Some(&100), "{days:?}");
        assert_eq!(days.get("2026-10-26"), Some(&96));
        // The repeated hour keeps distinct labels: the offset tells them apart.
        let labels: Vec<&str> = csv.lines().skip(1).map(|l| l.split(',').nth(2).unwrap_or("")).collect();
        assert!(labels.contains(&"2026-10-25T01:15:00+01:00") && labels.contains(&"2026-10-25T01:15:00+00:00"));
        let unique: std::collections::HashSet<&&str> = labels.iter().collect();
        assert_eq!(unique.len(), labels.len());
        // Interval-ending label: the first interval of the window ends at 00:15 local.
        assert!(csv.lines().nth(1).unwrap_or("").contains(",2026-10-24T00:15:00+01:00,"), "{}", &csv[..200]);
    }

    #[test]
    fn a_register_day_settles_at_its_advance() {
        let day = 1_774_656_000;
        let r = rows("M-1", day, day + 2 * 86_400, 0.5);
        let adv = |s: i64, e: i64, wh| Advance { meter_id: "M-1".into(), period_start: s, read_at: e, wh };
        // A daily advance, and a two-day one that settles no single day.
        let reads = vec![adv(day, day + 86_400, 12_345), adv(day, day + 2 * 86_400, 24_000)];
        // The levels' estimates of both days, off the recovered sum (12 000 Wh).
        let estimates: DayEstimates = [
            (("M-1".into(), day), (12_100.0, 11_000.0, 13_000.0)),
            (("M-1".into(), day + 86_400), (11_900.0, 11_500.0, 12_300.0)),
        ]
        .into();
        let d = daily(&r, &reads, 900, &estimates);
        assert_eq!(d.len(), 2);
        assert_eq!(
            (d[0].energy_wh, d[0].source.as_str(), d[0].uncertainty_wh, d[0].quality),
            (12_345.0, "register", Some(0.0), 0)
        );
        assert_eq!((d[0].low_wh, d[0].high_wh), (Some(12_345.0), Some(12_345.0)));
        assert!((d[0].recovered_wh - 12_000.0).abs() < 1e-9);
        assert_eq!((d[1].source.as_str(), d[1].energy_wh, d[1].quality), ("recovered", 11_900.0, 11));
        assert_eq!((d[1].low_wh, d[1].high_wh, d[1].recovered_wh), (Some(11_500.0), Some(12_300.0), 12_000.0));
        assert!((d[1].uncertainty_wh.unwrap_or(0.0) - 400.0 / Z95).abs() < 1e-9);
        // Without the levels' estimate a recovered day settles at the recovered sum, with no band.
        let plain = &daily(&r, &reads, 900, &DayEstimates::new())[1];
        assert_eq!((plain.energy_wh, plain.uncertainty_wh), (12_000.0, None));
        assert_eq!(d[0].derived, 96);
        // Without the recovery's bands a recovered day states none.
    }
}
