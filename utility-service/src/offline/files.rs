//! The file modes' inputs and outputs. CSV goes through the csv crate (quoted
//! cells, surrounding spaces, any column order, rows read by column name into
//! serde rows); every problem names the file, the line and the field.

use std::collections::{BTreeMap, HashMap};
use std::io::Write;
use std::path::Path;

use anyhow::Context;
use meterveil_shared::cluster::Clustering;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{LevelMatrix, Recovery, SumConstraint};
use meterveil_shared::{DitherProfile, FieldError, IntervalStart, MeterId};
use serde::de::DeserializeOwned;
use serde::{Deserialize, Serialize};

/// A recovery window: meters (sorted), first interval and the level matrix.
pub struct Window {
    pub meters: Vec<MeterId>,
    pub start: i64,
    pub interval_s: u32,
    pub levels: LevelMatrix,
}

impl Window {
    pub fn layout(&self) -> DayLayout {
        DayLayout { window_start: self.start, interval_s: self.interval_s }
    }
    pub fn interval_start(&self, col: usize) -> i64 {
        self.start + col as i64 * i64::from(self.interval_s)
    }
}

/// A file input problem: which file, which line (1-based; 0 for the whole file), what.
#[derive(Debug, thiserror::Error)]
#[error("{file} line {line}: {error}")]
pub struct InputError {
    pub file: String,
    pub line: usize,
    pub error: FieldError,
}

/// The rows of a CSV file with a header, each with its line number. `columns`
/// names the columns `T` reads, each with what its value must be ("an integer
/// epoch second"); a value that does not parse gets that as its reason.
pub(super) fn read_rows<T: DeserializeOwned>(path: &Path, columns: &[(&str, &str)]) -> anyhow::Result<Vec<(usize, T)>> {
    let file = path.display().to_string();
    let mut r = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .flexible(true)
        .from_path(path)
        .with_context(|| format!("opening {file}"))?;
    let bad = |line: usize, field: &str, reason: String| InputError {
        file: file.clone(),
        line,
        error: FieldError::new(field, reason),
    };
    let header: csv::StringRecord =
        r.headers().map_err(|e| bad(1, "header", e.to_string()))?.iter().map(str::to_ascii_lowercase).collect();
    let names: Vec<&str> = columns.iter().map(|c| c.0).collect();
    if let Some(missing) = names.iter().find(|n| !header.iter().any(|h| h == **n)) {
        return Err(bad(1, "header", format!("has no {missing} column (expected {})", names.join(","))).into());
    }
    let mut out = Vec::new();
    let mut rec = csv::StringRecord::new();
    loop {
        let line = r.position().line() as usize;
        match r.read_record(&mut rec) {
            Ok(false) => break,
            Ok(true) => {}
            Err(e) => return Err(bad(line, "line", format!("is not a CSV record: {e}")).into()),
        }
        let line = rec.position().map_or(line, |p| p.line() as usize);
        if rec.iter().all(str::is_empty) {
            continue;
        }
        let row = rec.deserialize::<T>(Some(&header)).map_err(|e| {
            let at = match e.kind() {
                csv::ErrorKind::Deserialize { err, .. } => err.field().map(|i| i as usize),
                _ => None,
            };
            match at.and_then(|i| Some((header.get(i)?, rec.get(i)?))) {
                Some((name, "")) => bad(line, name, "is missing".into()),
                Some((name, raw)) => {
                    let what = columns.iter().find(|c| c.0 == name).map_or("readable", |c| c.1);
                    bad(line, name, format!("{raw:?} is not {what}"))
                }
                None => bad(line, "line", e.to_string()),
            }
        })?;
        out.push((line, row));
    }
    Ok(out)
}

#[derive(Deserialize)]
struct LevelRow {
    meter_id: String,
    interval_start: i64,
    level: u8,
}

/// Reads quantized levels into a window. Every problem names the file, line and field.
pub fn read_levels(path: &Path, profile: &DitherProfile) -> anyhow::Result<Window> {
    let file = path.display().to_string();
    let rows: Vec<(usize, LevelRow)> = read_rows(
        path,
        &[("meter_id", "a meter id"), ("interval_start", "an integer epoch second"), ("level", "a level number")],
    )?;
    let (len, k) = (profile.interval(), profile.levels());
    let err = |line: usize, e: FieldError| InputError { file: file.clone(), line, error: e };
    for (line, r) in &rows {
        MeterId::parse(&r.meter_id).map_err(|e| err(*line, e))?;
        IntervalStart::new(r.interval_start, len).map_err(|e| err(*line, e))?;
        if usize::from(r.level) >= k {
            let reason = format!("{} is out of range: the profile has {k} levels (0 to {})", r.level, k - 1);
            return Err(err(*line, FieldError::new("level", reason)).into());
        }
    }
    if rows.is_empty() {
        return Err(err(0, FieldError::new("rows", "the file has no levels")).into());
    }
    let start = rows.iter().map(|r| r.1.interval_start).min().unwrap_or(0);
    let end = rows.iter().map(|r| r.1.interval_start).max().unwrap_or(0);
    let step = i64::from(len.seconds());
    let cols = ((end - start) / step + 1) as usize;
    if cols > 400_000 {
        let reason = format!("the window spans {cols} intervals; split it");
        return Err(err(0, FieldError::new("interval_start", reason)).into());
    }
    let mut index: BTreeMap<&str, usize> = rows.iter().map(|r| (r.1.meter_id.as_str(), 0)).collect();
    for (i, v) in index.values_mut().enumerate() {
        *v = i;
    }
    let mut levels = LevelMatrix::missing(index.len(), cols);
    let mut seen: HashMap<(usize, usize), usize> = HashMap::with_capacity(rows.len());
    for (line, r) in &rows {
        let (m, t) = (&r.meter_id, r.interval_start);
        let (i, j) = (index[m.as_str()], ((t - start) / step) as usize);
        if let Some(prev) = seen.insert((i, j), *line) {
            let reason = format!("meter {m} at {t} repeats line {prev}");
            return Err(err(*line, FieldError::new("interval_start", reason)).into());
        }
        levels.set(i, j, Some(r.level));
    }
    let meters = index.keys().map(|m| MeterId::parse(m)).collect::<Result<Vec<_>, _>>()?;
    Ok(Window { meters, start, interval_s: len.seconds(), levels })
}

#[derive(Deserialize)]
struct RegisterRow {
    meter_id: String,
    day_start: i64,
    wh: f64,
}

/// Reads daily register energies into sum constraints. Days not wholly inside the
/// window are skipped (returned count), since their energy includes intervals we do not fit.
pub fn read_registers(path: &Path, w: &Window) -> anyhow::Result<(Vec<SumConstraint>, usize)> {
    let file = path.display().to_string();
    let rows: Vec<(usize, RegisterRow)> =
        read_rows(path, &[("meter_id", "a meter id"), ("day_start", "an integer epoch second"), ("wh", "a number")])?;
    let index: HashMap<&str, usize> = w.meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let per_day = (86_400 / w.interval_s) as i64;
    let step = i64::from(w.interval_s);
    let (mut out, mut skipped) = (Vec::new(), 0);
    for (line, r) in rows {
        let err = |e: FieldError| InputError { file: file.clone(), line, error: e };
        let Some(&row) = index.get(r.meter_id.as_str()) else {
            let reason = format!("meter {} has no levels in the levels file", r.meter_id);
            return Err(err(FieldError::new("meter_id", reason)).into());
        };
        if r.day_start.rem_euclid(86_400) != 0 {
            return Err(err(FieldError::new("day_start", format!("{} is not a UTC midnight", r.day_start))).into());
        }
        if !(r.wh.is_finite() && r.wh >= 0.0) {
            return Err(err(FieldError::new("wh", format!("{} must be a non-negative number of Wh", r.wh))).into());
        }
        let first = (r.day_start - w.start) / step;
        if first < 0 || first + per_day > w.levels.cols() as i64 || (r.day_start - w.start) % step != 0 {
            skipped += 1;
            continue;
        }
        out.push(SumConstraint::from_wh(row, first as usize..(first + per_day) as usize, r.wh, w.interval_s));
    }
    Ok((out, skipped))
}

/// One line of a `recover` output.
#[derive(Serialize)]
struct RecoveredLine<'a> {
    meter_id: &'a str,
    interval_start: i64,
    kw: f64,
    flag: &'a str,
    kw_low: f64,
    kw_high: f64,
}

/// Rounds to 4 decimals (0.1 W), enough for kW and a quarter of the digits.
fn round4(x: f64) -> f64 {
    (x * 1e4).round() / 1e4
}

/// Writes every meter and interval of the window with its flag and 95% band.
pub fn write_recovery(path: &Path, w: &Window, rec: &Recovery, alpha: f64) -> anyhow::Result<()> {
    let mut out = csv::Writer::from_path(path).with_context(|| format!("creating {}", path.display()))?;
    for (i, m) in w.meters.iter().enumerate() {
        for j in 0..w.levels.cols() {
            let (x, sd) = (rec.x[(i, j)], rec.std_kw[(i, j)]);
            let (lo, hi) = meterveil_shared::recovery::band95(x, sd, alpha);
            out.serialize(RecoveredLine {
                meter_id: m.as_str(),
                interval_start: w.interval_start(j),
                kw: round4(x),
                flag: rec.flag(i, j).as_str(),
                kw_low: round4(lo),
                kw_high: round4(hi),
            })?;
        }
    }
    out.flush()?;
    Ok(())
}

/// One line of a `cluster` output.
#[derive(Serialize)]
struct ClusterLine<'a> {
    meter_id: &'a str,
    cluster: usize,
    confidence: f64,
    status: &'a str,
}

/// Writes each meter's cluster, confidence and status.
pub fn write_clusters(path: &Path, meters: &[String], c: &Clustering) -> anyhow::Result<()> {
    let mut out = csv::Writer::from_path(path).with_context(|| format!("creating {}", path.display()))?;
    for (i, m) in meters.iter().enumerate() {
        out.serialize(ClusterLine {
            meter_id: m,
            cluster: c.labels[i],
            confidence: (c.confidence[i] * 1e3).round() / 1e3,
            status: if c.assigned[i] { "assigned" } else { "unassigned" },
        })?;
    }
    out.flush()?;
    Ok(())
}

/// Recovered profiles read back from a `recover` output file.
pub struct Profiles {
    pub meters: Vec<String>,
    pub start: i64,
    pub interval_s: u32,
    /// (meters, intervals) kW.
    pub kw: nalgebra::DMatrix<f64>,
}

#[derive(Deserialize)]
struct ProfileRow {
    meter_id: String,
    interval_start: i64,
    kw: f64,
}

/// Reads OUT.csv (`meter_id,interval_start,kw,…`); every meter must cover the same intervals.
pub fn read_profiles(path: &Path) -> anyhow::Result<Profiles> {
    let file = path.display().to_string();
    let lines: Vec<(usize, ProfileRow)> = read_rows(
        path,
        &[("meter_id", "a meter id"), ("interval_start", "an integer epoch second"), ("kw", "a number")],
    )?;
    let whole =
        |field: &str, reason: &str| InputError { file: file.clone(), line: 0, error: FieldError::new(field, reason) };
    let mut rows: BTreeMap<String, BTreeMap<i64, f64>> = BTreeMap::new();
    for (line, r) in lines {
        let err = |e: FieldError| InputError { file: file.clone(), line, error: e };
        let m = MeterId::parse(&r.meter_id).map_err(err)?;
        if !(r.kw.is_finite() && r.kw >= 0.0) {
            return Err(err(FieldError::new("kw", format!("{} must be a non-negative number", r.kw))).into());
        }
        if rows.entry(m.to_string()).or_default().insert(r.interval_start, r.kw).is_some() {
            let reason = format!("meter {m} repeats interval {}", r.interval_start);
            return Err(err(FieldError::new("interval_start", reason)).into());
        }
    }
    let Some(first) = rows.values().next() else {
        return Err(whole("rows", "the file has no profiles").into());
    };
    let times: Vec<i64> = first.keys().copied().collect();
    if times.len() < 2 {
        return Err(whole("interval_start", "a profile needs at least two intervals").into());
    }
    let step = times[1] - times[0];
    if step <= 0 || 86_400 % step != 0 || times.windows(2).any(|w| w[1] - w[0] != step) {
        return Err(whole("interval_start", "intervals must be evenly spaced and divide a day").into());
    }
    if let Some(m) = rows.iter().find(|(_, r)| r.len() != times.len() || r.keys().zip(&times).any(|(a, b)| a != b)) {
        let reason = format!("meter {} does not cover the same intervals as the others", m.0);
        return Err(whole("meter_id", &reason).into());
    }
    let meters: Vec<String> = rows.keys().cloned().collect();
    let kw = nalgebra::DMatrix::from_fn(meters.len(), times.len(), |i, j| rows[&meters[i]][&times[j]]);
    Ok(Profiles { meters, start: times[0], interval_s: step as u32, kw })
}

/// Writes `contents` to `path` through a temporary file in the same folder and
/// a rename, so that a reader never sees half a file.
pub fn write_atomically(path: &Path, contents: &[u8]) -> anyhow::Result<()> {
    let dir = path.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
    let mut tmp = tempfile::NamedTempFile::new_in(dir).with_context(|| format!("writing into {}", dir.display()))?;
    tmp.write_all(contents)?;
    tmp.as_file().sync_all()?;
    tmp.persist(path).with_context(|| format!("writing {}", path.display()))?;
    Ok(())
}

/// Reads a list of meter ids, one per line (`#` starts a comment), and returns
/// their rows in the window. Every problem names the line.
pub fn read_captured(path: &Path, w: &Window) -> anyhow::Result<Vec<usize>> {
    let file = path.display().to_string();
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {file}"))?;
    let rows: HashMap<&str, usize> = w.meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let mut out: Vec<usize> = Vec::new();
    for (no, line) in text.lines().enumerate() {
        let id = line.split('#').next().unwrap_or("").trim();
        if id.is_empty() {
            continue;
        }
        let err = |reason: String| InputError {
            file: file.clone(),
            line: no + 1,
            error: FieldError::new("meter_id", reason),
        };
        let m = MeterId::parse(id).map_err(|e| err(e.reason))?;
        let Some(&row) = rows.get(m.as_str()) else {
            return Err(err(format!("meter {m} has no levels in the levels file")).into());
        };
        if out.contains(&row) {
            return Err(err(format!("meter {m} is named twice")).into());
        }
        out.push(row);
    }
    if out.is_empty() {
        return Err(InputError { file, line: 0, error: FieldError::new("meter_id", "names no captured meter") }.into());
    }
    Ok(out)
}

pub fn read_profile_file(path: &Path) -> anyhow::Result<DitherProfile> {
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    DitherProfile::from_json(&text).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}
