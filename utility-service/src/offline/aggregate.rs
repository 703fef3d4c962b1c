//! The `aggregate` file mode: each group's load per interval with a 95% band,
//! from a `recover` output, the levels it was fitted to and their dither
//! profile (`shared::aggregate`: each meter's spread around its profile, each
//! interval's load given its level, summed over the group's meters).

use std::collections::BTreeMap;
use std::path::Path;

use meterveil_shared::aggregate::{group_load, meter_spreads, moments, Spread};
use meterveil_shared::bootstrap::{fit_draws, Fit, FitDraws};
use meterveil_shared::mechanism::secure_rng;
use meterveil_shared::recovery::linalg::truncate;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{RecoveryParams, SumConstraint};
use meterveil_shared::{DitherProfile, FieldError};
use serde::Deserialize;

use meterveil_shared::tariff::TariffCalendar;

use super::files::{
    read_levels, read_profile_file, read_profiles, read_registers, read_rows, write_atomically, InputError,
};
use meterveil_shared::energies::{band_label, day_label, meter_energies, EnergyCell, Fitted};

/// At most this many groups in one file: the output has a row per group and interval.
pub const MAX_GROUPS: usize = 10_000;

/// The files of one `aggregate` run.
pub struct AggregateFiles<'a> {
    pub profiles: &'a Path,
    pub levels: &'a Path,
    pub profile: &'a Path,
    pub groups: &'a Path,
    pub output: &'a Path,
    /// A tariff calendar and where to write each meter's band energies.
    pub tariff: Option<(&'a Path, &'a Path)>,
    /// Where to write each meter's daily energies.
    pub daily: Option<&'a Path>,
    /// Register reads (meter_id,day_start,wh) the energies are reconciled to.
    pub registers: Option<&'a Path>,
    /// The bands' bootstrap: its draws, and the profiles' rank (`None`: estimated).
    pub bootstrap: (usize, Option<usize>),
}

/// The bands' bootstrap of the profiles (`(draws, rank)`; no rank: estimated),
/// and the rank it ran at.
fn bootstrap(
    (draws, rank): (usize, Option<usize>),
    x: &nalgebra::DMatrix<f64>,
    w: &super::files::Window,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    spreads: &[Spread],
) -> anyhow::Result<(FitDraws, usize)> {
    let rank = rank.unwrap_or_else(|| profile_rank(x));
    if draws == 0 {
        return Ok((FitDraws::default(), rank));
    }
    let params = RecoveryParams::default().check().map_err(|e| anyhow::anyhow!("{e}"))?;
    let layout = DayLayout { window_start: w.start, interval_s: w.interval_s };
    let fit = Fit { x, rank, levels: &w.levels, profile, constraints, layout, spreads, params: &params };
    let out = fit_draws(&fit, draws, &mut secure_rng())
        .map_err(|e| anyhow::anyhow!("--{}: {}", e.field.replace('_', "-"), e.reason))?;
    Ok((out, rank))
}

/// The fewest singular values holding 99.9% of the profiles' square (of the
/// first 40): the rank a `recover` output was fitted at, up to the clamping
/// of estimates to [0, alpha].
fn profile_rank(x: &nalgebra::DMatrix<f64>) -> usize {
    let lr = truncate(x, 40, 10, 2, None, &mut secure_rng());
    let total: f64 = lr.s.iter().map(|s| s * s).sum();
    let mut held = 0.0;
    for (k, s) in lr.s.iter().enumerate() {
        held += s * s;
        if held >= 0.999 * total {
            return k + 1;
        }
    }
    lr.s.len().max(1)
}

/// Reads and checks a tariff calendar file (at most 1 MB).
pub fn read_calendar(path: &Path) -> anyhow::Result<TariffCalendar> {
    let file = path.display().to_string();
    let too_big = std::fs::metadata(path).map(|m| m.len() > 1 << 20).unwrap_or(false);
    if too_big {
        let error = FieldError::new("calendar", "the file is larger than 1 MB");
        return Err(InputError { file, line: 0, error }.into());
    }
    let text = std::fs::read_to_string(path).map_err(|e| anyhow::anyhow!("reading {file}: {e}"))?;
    TariffCalendar::parse(&text).map_err(|e| InputError { file, line: e.line, error: e.error }.into())
}

/// Writes energy cells as CSV: `head` names the label's columns.
fn write_energies(
    path: &Path,
    meters: &[String],
    cells: &[EnergyCell],
    head: &[&str],
    label: &dyn Fn(&EnergyCell) -> Vec<String>,
) -> anyhow::Result<()> {
    let mut out = csv::Writer::from_writer(Vec::new());
    let mut header = vec!["meter_id"];
    header.extend_from_slice(head);
    header.extend_from_slice(&["kwh", "kwh_low", "kwh_high", "intervals", "register_read"]);
    out.write_record(&header)?;
    for c in cells {
        let mut row = vec![meters[c.meter].clone()];
        row.extend(label(c));
        row.extend([
            format!("{:.4}", c.kwh),
            format!("{:.4}", c.kwh_low),
            format!("{:.4}", c.kwh_high),
            c.intervals.to_string(),
            c.registered.to_string(),
        ]);
        out.write_record(&row)?;
    }
    write_atomically(path, &out.into_inner()?)
}

#[derive(Deserialize)]
struct GroupRow {
    meter_id: String,
    group: String,
}

/// Reads GROUPS.csv (`meter_id,group`) into each group's rows of `meters`. A
/// meter may sit in several groups (a transformer and a portfolio). Every
/// problem names the file, the line and the field.
pub fn read_groups(path: &Path, meters: &[String]) -> anyhow::Result<BTreeMap<String, Vec<usize>>> {
    let file = path.display().to_string();
    let rows: Vec<(usize, GroupRow)> = read_rows(path, &[("meter_id", "a meter id"), ("group", "a group name")])?;
    let index: std::collections::HashMap<&str, usize> =
        meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let mut groups: BTreeMap<String, Vec<usize>> = BTreeMap::new();
    for (line, r) in rows {
        let bad = |field: &str, reason: String| InputError {
            file: file.clone(),
            line,
            error: FieldError::new(field, reason),
        };
        let g = r.group.trim();
        if g.is_empty() || g.chars().count() > 64 || g.chars().any(char::is_control) {
            return Err(bad("group", format!("{g:?} is not a group name of 1 to 64 printable characters")).into());
        }
        let Some(&i) = index.get(r.meter_id.trim()) else {
            return Err(bad("meter_id", format!("meter {:?} is not in the profiles file", r.meter_id)).into());
        };
        let members = groups.entry(g.to_owned()).or_default();
        if members.contains(&i) {
            return Err(bad("meter_id", format!("meter {} is named twice in group {g}", r.meter_id)).into());
        }
        members.push(i);
        if groups.len() > MAX_GROUPS {
            return Err(bad("group", format!("more than {MAX_GROUPS} groups in one file")).into());
        }
    }
    if groups.is_empty() {
        let error = FieldError::new("rows", "the file names no meter in any group");
        return Err(InputError { file, line: 0, error }.into());
    }
    Ok(groups)
}

/// The whole `aggregate` command; returns the JSON summary line.
pub fn run_aggregate(a: &AggregateFiles<'_>) -> anyhow::Result<serde_json::Value> {
    let profile = read_profile_file(a.profile)?;
    let rec = read_profiles(a.profiles)?;
    let w = read_levels(a.levels, &profile)?;
    let level_meters: Vec<String> = w.meters.iter().map(ToString::to_string).collect();
    let whole = |field: &str, reason: String| InputError {
        file: a.levels.display().to_string(),
        line: 0,
        error: FieldError::new(field, reason),
    };
    if level_meters != rec.meters {
        return Err(whole("meter_id", "the levels' meters are not the profiles' meters".into()).into());
    }
    if (w.start, w.interval_s, w.levels.cols()) != (rec.start, rec.interval_s, rec.kw.ncols()) {
        let reason = format!(
            "the levels cover {} intervals of {} s from {}, the profiles {} of {} s from {}",
            w.levels.cols(),
            w.interval_s,
            w.start,
            rec.kw.ncols(),
            rec.interval_s,
            rec.start
        );
        return Err(whole("interval_start", reason).into());
    }
    let groups = read_groups(a.groups, &rec.meters)?;
    let calendar = a.tariff.map(|(t, _)| read_calendar(t)).transpose()?;
    let constraints = a.registers.map(|p| read_registers(p, &w)).transpose()?.map(|r| r.0).unwrap_or_default();
    let spreads = meter_spreads(&rec.kw, &w.levels, &profile, rec.interval_s);
    let (draws, rank) = bootstrap(a.bootstrap, &rec.kw, &w, &profile, &constraints, &spreads)?;
    let energies = |label: &dyn Fn(i64) -> Option<(chrono::NaiveDate, usize)>| {
        let fitted = Fitted { x: &rec.kw, levels: &w.levels, start: w.start, interval_s: w.interval_s, draws: &draws };
        meter_energies(fitted, &profile, &spreads, &constraints, label)
    };
    // Every input is read and checked before the first output is written.
    if let (Some(cal), Some((_, out))) = (&calendar, a.tariff) {
        let cells = energies(&band_label(cal));
        let label = |c: &EnergyCell| {
            vec![c.label.0.to_string(), cal.period_end(c.label.0).to_string(), cal.bands[c.label.1].clone()]
        };
        write_energies(out, &rec.meters, &cells, &["period_start", "period_end", "band"], &label)?;
    }
    if let Some(out) = a.daily {
        let cells = energies(&day_label(calendar.as_ref().map(|c| c.zone)));
        write_energies(out, &rec.meters, &cells, &["day"], &|c| vec![c.label.0.to_string()])?;
    }
    let taus: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let (mean, var) = moments(&rec.kw, &w.levels, &profile, &taus);
    let mut out = csv::Writer::from_writer(Vec::new());
    out.write_record(["group", "interval_start", "kw", "kw_low", "kw_high", "meters"])?;
    for (name, rows) in &groups {
        let fit = draws.group_variances(rows, rec.kw.ncols());
        for (j, (kw, lo, hi)) in group_load(&mean, &var, rows, &fit).into_iter().enumerate() {
            let t = rec.start + j as i64 * i64::from(rec.interval_s);
            let cells = [format!("{kw:.4}"), format!("{lo:.4}"), format!("{hi:.4}")];
            out.write_record([
                name.as_str(),
                &t.to_string(),
                &cells[0],
                &cells[1],
                &cells[2],
                &rows.len().to_string(),
            ])?;
        }
    }
    write_atomically(a.output, &out.into_inner()?)?;
    let mut sorted: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    sorted.sort_by(f64::total_cmp);
    Ok(serde_json::json!({
        "groups": groups.len(),
        "meters": rec.meters.len(),
        "intervals": rec.kw.ncols(),
        "median_spread_kw": sorted.get(sorted.len() / 2),
        "bootstrap_draws": draws.shifts.len(),
        "rank": rank,
        "band": "95%, from each meter's spread around its profile, its levels and a bootstrap of the fit \
                 (bootstrap_draws); measured coverage on independent feeders 90-99% at dither σ 0.3 and 1.0 kW \
                 for group loads, meter-days and band energies, on BDEW 76-92% (README, \"Group loads and their bands\")",
        "tariff": calendar.as_ref().map(|c| c.name.clone()),
        "register_reads": constraints.len(),
        "output": a.output.display().to_string(),
    }))
}
