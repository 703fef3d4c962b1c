//! File mode for analysts: `utility-service recover` reads levels, a profile and
//! optional register energies from files, and writes the recovered profiles.
//!
//! - LEVELS.csv: header `meter_id,interval_start,level` (any column order; UTC
//!   epoch seconds; absent rows are missing readings).
//! - PROFILE.json: `{"noise":…,"scale_kw":…,"boundaries_kw":[…],"interval_s":900}`.
//! - REG.csv: header `meter_id,day_start,wh`: a meter's energy over one UTC day.
//! - OUT.csv: `meter_id,interval_start,kw,flag,kw_low,kw_high`, every meter and
//!   interval of the window (the span from the earliest to the latest level).

use std::collections::{BTreeMap, HashMap};
use std::io::{BufRead, BufWriter, Write};
use std::path::Path;

use anyhow::Context;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, LevelMatrix, Recovery, RecoveryParams, SumConstraint};
use meterveil_shared::{DitherProfile, FieldError, IntervalStart, MeterId};

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

fn header_positions(file: &str, header: &str, want: &[&str]) -> Result<Vec<usize>, InputError> {
    let cols: Vec<String> = header.split(',').map(|c| c.trim().to_ascii_lowercase()).collect();
    want.iter()
        .map(|w| {
            cols.iter().position(|c| c == w).ok_or_else(|| InputError {
                file: file.into(),
                line: 1,
                error: FieldError::new("header", format!("has no {w} column (expected {})", want.join(","))),
            })
        })
        .collect()
}

fn cells(line: &str) -> Vec<&str> {
    line.split(',').map(str::trim).collect()
}

fn get<'a>(file: &str, line: usize, c: &[&'a str], pos: usize, field: &str) -> Result<&'a str, InputError> {
    c.get(pos).copied().ok_or_else(|| InputError {
        file: file.into(),
        line,
        error: FieldError::new(field, "is missing"),
    })
}

/// Reads quantized levels into a window. Every problem names the file, line and field.
pub fn read_levels(path: &Path, profile: &DitherProfile) -> anyhow::Result<Window> {
    let file = path.display().to_string();
    let f = std::fs::File::open(path).with_context(|| format!("opening {file}"))?;
    let mut lines = std::io::BufReader::new(f).lines();
    let header = lines.next().transpose()?.unwrap_or_default();
    let pos = header_positions(&file, &header, &["meter_id", "interval_start", "level"])?;
    let len = profile.interval();
    let k = profile.levels();
    let mut rows: Vec<(String, i64, u8)> = Vec::new();
    for (no, line) in lines.enumerate() {
        let line_no = no + 2;
        let line = line?;
        if line.trim().is_empty() {
            continue;
        }
        let c = cells(&line);
        let err = |e: FieldError| InputError { file: file.clone(), line: line_no, error: e };
        let meter = MeterId::parse(get(&file, line_no, &c, pos[0], "meter_id")?).map_err(err)?;
        let raw_t = get(&file, line_no, &c, pos[1], "interval_start")?;
        let t: i64 = raw_t
            .parse()
            .map_err(|_| err(FieldError::new("interval_start", format!("{raw_t:?} is not an integer epoch second"))))?;
        IntervalStart::new(t, len).map_err(err)?;
        let raw_l = get(&file, line_no, &c, pos[2], "level")?;
        let level: u8 =
            raw_l.parse().map_err(|_| err(FieldError::new("level", format!("{raw_l:?} is not a level number"))))?;
        if usize::from(level) >= k {
            return Err(err(FieldError::new(
                "level",
                format!("{level} is out of range: the profile has {k} levels (0 to {})", k - 1),
            ))
            .into());
        }
        rows.push((meter.to_string(), t, level));
    }
    if rows.is_empty() {
        return Err(InputError { file, line: 0, error: FieldError::new("rows", "the file has no levels") }.into());
    }
    let start = rows.iter().map(|r| r.1).min().unwrap_or(0);
    let end = rows.iter().map(|r| r.1).max().unwrap_or(0);
    let step = i64::from(len.seconds());
    let cols = ((end - start) / step + 1) as usize;
    if cols > 400_000 {
        return Err(InputError {
            file,
            line: 0,
            error: FieldError::new("interval_start", format!("the window spans {cols} intervals; split it")),
        }
        .into());
    }
    let mut index: BTreeMap<String, usize> = BTreeMap::new();
    for r in &rows {
        index.entry(r.0.clone()).or_insert(0);
    }
    for (i, v) in index.values_mut().enumerate() {
        *v = i;
    }
    let mut levels = LevelMatrix::missing(index.len(), cols);
    let mut seen: HashMap<(usize, usize), usize> = HashMap::with_capacity(rows.len());
    for (n, (m, t, l)) in rows.iter().enumerate() {
        let (i, j) = (index[m], ((t - start) / step) as usize);
        if let Some(prev) = seen.insert((i, j), n) {
            return Err(InputError {
                file,
                line: n + 2,
                error: FieldError::new("interval_start", format!("meter {m} at {t} repeats data line {}", prev + 2)),
            }
            .into());
        }
        levels.set(i, j, Some(*l));
    }
    let meters = index.keys().map(|m| MeterId::parse(m)).collect::<Result<Vec<_>, _>>()?;
    Ok(Window { meters, start, interval_s: len.seconds(), levels })
}

/// Reads daily register energies into sum constraints. Days not wholly inside the
/// window are skipped (returned count), since their energy includes intervals we do not fit.
pub fn read_registers(path: &Path, w: &Window) -> anyhow::Result<(Vec<SumConstraint>, usize)> {
    let file = path.display().to_string();
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {file}"))?;
    let mut lines = text.lines();
    let pos = header_positions(&file, lines.next().unwrap_or(""), &["meter_id", "day_start", "wh"])?;
    let rows: HashMap<&str, usize> = w.meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let per_day = (86_400 / w.interval_s) as i64;
    let (mut out, mut skipped) = (Vec::new(), 0);
    for (no, line) in lines.enumerate() {
        let line_no = no + 2;
        if line.trim().is_empty() {
            continue;
        }
        let c = cells(line);
        let err = |e: FieldError| InputError { file: file.clone(), line: line_no, error: e };
        let meter = get(&file, line_no, &c, pos[0], "meter_id")?;
        let Some(&row) = rows.get(meter) else {
            return Err(
                err(FieldError::new("meter_id", format!("meter {meter} has no levels in the levels file"))).into()
            );
        };
        let raw_d = get(&file, line_no, &c, pos[1], "day_start")?;
        let day: i64 = raw_d
            .parse()
            .map_err(|_| err(FieldError::new("day_start", format!("{raw_d:?} is not an integer epoch second"))))?;
        if day.rem_euclid(86_400) != 0 {
            return Err(err(FieldError::new("day_start", format!("{day} is not a UTC midnight"))).into());
        }
        let raw_wh = get(&file, line_no, &c, pos[2], "wh")?;
        let wh: f64 = raw_wh.parse().map_err(|_| err(FieldError::new("wh", format!("{raw_wh:?} is not a number"))))?;
        if !(wh.is_finite() && wh >= 0.0) {
            return Err(err(FieldError::new("wh", format!("{wh} must be a non-negative number of Wh"))).into());
        }
        let first = (day - w.start) / i64::from(w.interval_s);
        if first < 0 || first + per_day > w.levels.cols() as i64 || (day - w.start) % i64::from(w.interval_s) != 0 {
            skipped += 1;
            continue;
        }
        let cols = first as usize..(first + per_day) as usize;
        out.push(SumConstraint::from_wh(row, cols, wh, w.interval_s));
    }
    Ok((out, skipped))
}

/// Writes every meter and interval of the window with its flag and 95% band.
pub fn write_recovery(path: &Path, w: &Window, rec: &Recovery, alpha: f64) -> anyhow::Result<()> {
    let f = std::fs::File::create(path).with_context(|| format!("creating {}", path.display()))?;
    let mut out = BufWriter::new(f);
    writeln!(out, "meter_id,interval_start,kw,flag,kw_low,kw_high")?;
    for (i, m) in w.meters.iter().enumerate() {
        for j in 0..w.levels.cols() {
            let (x, sd) = (rec.x[(i, j)], rec.std_kw[(i, j)]);
            let (lo, hi) = meterveil_shared::recovery::band95(x, sd, alpha);
            writeln!(out, "{m},{},{x:.4},{},{lo:.4},{hi:.4}", w.interval_start(j), rec.flag(i, j).as_str())?;
        }
    }
    out.flush()?;
    Ok(())
}

/// Progress on a terminal as a bar, otherwise as plain lines.
pub fn progress_reporter() -> impl FnMut(&str, f64) {
    use std::io::IsTerminal;
    let bar = std::io::stderr().is_terminal().then(|| {
        let b = indicatif::ProgressBar::new(1000);
        b.set_style(
            indicatif::ProgressStyle::with_template("{msg:>16} [{bar:40}] {percent:>3}%")
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        b
    });
    let mut last = String::new();
    move |stage: &str, frac: f64| match &bar {
        Some(b) => {
            b.set_message(stage.to_owned());
            b.set_position((frac * 1000.0) as u64);
            if stage == "fitting" && frac >= 1.0 {
                b.finish_and_clear();
            }
        }
        None => {
            let line = format!("{stage} {:.0}%", frac * 100.0);
            if line != last {
                eprintln!("{line}");
                last = line;
            }
        }
    }
}

/// The whole `recover` command; returns the JSON summary line.
pub fn run_recover(
    levels: &Path,
    profile: &Path,
    output: &Path,
    registers: Option<&Path>,
    params: RecoveryParams,
) -> anyhow::Result<serde_json::Value> {
    let alpha = params.alpha_kw;
    let params = params.check().map_err(|e| anyhow::anyhow!("--{}: {}", e.field.replace('_', "-"), e.reason))?;
    let (profile, w, constraints, skipped) = read_feeder(levels, profile, registers)?;
    let mut report = progress_reporter();
    let rec = recover(&w.levels, &profile, &constraints, w.layout(), &params, &mut report)?;
    write_recovery(output, &w, &rec, alpha)?;
    let d = &rec.diagnostics;
    Ok(serde_json::json!({
        "meters": w.meters.len(),
        "intervals": w.levels.cols(),
        "window_start": w.start,
        "readings": d.readings,
        "register_days": constraints.len(),
        "register_days_outside_window": skipped,
        "rank": d.rank,
        "rank_scores": d.rank_scores,
        "iterations": d.iterations,
        "stop": d.stop,
        "log_likelihood_per_reading": d.log_likelihood_per_reading,
        "corrected": d.corrected,
        "outage_intervals": d.outage_intervals,
        "infeasible_constraints": d.infeasible_constraints,
        "wall_s": d.wall_s,
        "output": output.display().to_string(),
    }))
}

/// Recovered profiles read back from a `recover` output file.
pub struct Profiles {
    pub meters: Vec<String>,
    pub start: i64,
    pub interval_s: u32,
    /// (meters, intervals) kW.
    pub kw: nalgebra::DMatrix<f64>,
}

/// Reads OUT.csv (`meter_id,interval_start,kw,…`); every meter must cover the same intervals.
pub fn read_profiles(path: &Path) -> anyhow::Result<Profiles> {
    let file = path.display().to_string();
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {file}"))?;
    let mut lines = text.lines();
    let pos = header_positions(&file, lines.next().unwrap_or(""), &["meter_id", "interval_start", "kw"])?;
    let mut rows: BTreeMap<String, BTreeMap<i64, f64>> = BTreeMap::new();
    for (no, line) in lines.enumerate() {
        let line_no = no + 2;
        if line.trim().is_empty() {
            continue;
        }
        let c = cells(line);
        let err = |e: FieldError| InputError { file: file.clone(), line: line_no, error: e };
        let m = MeterId::parse(get(&file, line_no, &c, pos[0], "meter_id")?).map_err(err)?;
        let raw_t = get(&file, line_no, &c, pos[1], "interval_start")?;
        let t: i64 = raw_t
            .parse()
            .map_err(|_| err(FieldError::new("interval_start", format!("{raw_t:?} is not an integer"))))?;
        let raw_kw = get(&file, line_no, &c, pos[2], "kw")?;
        let kw: f64 = raw_kw.parse().map_err(|_| err(FieldError::new("kw", format!("{raw_kw:?} is not a number"))))?;
        if !(kw.is_finite() && kw >= 0.0) {
            return Err(err(FieldError::new("kw", format!("{kw} must be a non-negative number"))).into());
        }
        if rows.entry(m.to_string()).or_default().insert(t, kw).is_some() {
            return Err(err(FieldError::new("interval_start", format!("meter {m} repeats interval {t}"))).into());
        }
    }
    let Some(first) = rows.values().next() else {
        return Err(InputError { file, line: 0, error: FieldError::new("rows", "the file has no profiles") }.into());
    };
    let times: Vec<i64> = first.keys().copied().collect();
    if times.len() < 2 {
        return Err(InputError {
            file,
            line: 0,
            error: FieldError::new("interval_start", "a profile needs at least two intervals"),
        }
        .into());
    }
    let step = times[1] - times[0];
    if step <= 0 || 86_400 % step != 0 || times.windows(2).any(|w| w[1] - w[0] != step) {
        return Err(InputError {
            file,
            line: 0,
            error: FieldError::new("interval_start", "intervals must be evenly spaced and divide a day"),
        }
        .into());
    }
    for (m, r) in &rows {
        if r.len() != times.len() || r.keys().zip(&times).any(|(a, b)| a != b) {
            return Err(InputError {
                file,
                line: 0,
                error: FieldError::new(
                    "meter_id",
                    format!("meter {m} does not cover the same intervals as the others"),
                ),
            }
            .into());
        }
    }
    let meters: Vec<String> = rows.keys().cloned().collect();
    let kw = nalgebra::DMatrix::from_fn(meters.len(), times.len(), |i, j| rows[&meters[i]][&times[j]]);
    Ok(Profiles { meters, start: times[0], interval_s: step as u32, kw })
}

/// What the `cluster` command clusters.
pub enum ClusterInput<'a> {
    /// A `recover` output, clustered as it is.
    Profiles(&'a Path),
    /// Levels and their dither profile (and optional register reads), fitted at
    /// the clustering rank first.
    Levels { levels: &'a Path, profile: &'a Path, registers: Option<&'a Path>, alpha_kw: f64 },
}

/// The whole `cluster` command; returns the JSON summary line.
pub fn run_cluster(
    input: ClusterInput<'_>,
    output: &Path,
    clusters: Option<usize>,
) -> anyhow::Result<serde_json::Value> {
    use meterveil_shared::cluster::{cluster, representation, representatives, ClusterParams, CLUSTER_RANK};
    let params = ClusterParams { clusters, ..ClusterParams::default() };
    // The matrix clustered; its representative days come from it too.
    let (meters, start, interval_s, z, note) = match input {
        ClusterInput::Profiles(path) => {
            let p = read_profiles(path)?;
            let note = format!(
                "clustered the given profiles as they are: a recover output at the automatic rank (often 2-10) has lost \
                 classes that differ in shape; give --levels and --profile instead to cluster a rank-{CLUSTER_RANK} fit"
            );
            (p.meters, p.start, p.interval_s, p.kw, note)
        }
        ClusterInput::Levels { levels, profile, registers, alpha_kw } => {
            if !(alpha_kw.is_finite() && alpha_kw > 0.0 && alpha_kw <= 10_000.0) {
                anyhow::bail!("--alpha-kw: must be a positive number of kW up to 10000");
            }
            let (profile, w, constraints, _) = read_feeder(levels, profile, registers)?;
            let mut report = progress_reporter();
            let (z, fit) = representation(&w.levels, &profile, &constraints, w.layout(), alpha_kw, &mut report)
                .map_err(|e| anyhow::anyhow!("--{}: {}", e.field.replace('_', "-"), e.reason))?;
            let note = format!(
                "clustered a rank-{CLUSTER_RANK} fit of the levels ({} iterations, stopped: {})",
                fit.iterations,
                serde_json::to_value(fit.stop).ok().and_then(|v| v.as_str().map(str::to_owned)).unwrap_or_default()
            );
            let meters = w.meters.iter().map(|m| m.to_string()).collect::<Vec<String>>();
            (meters, w.start, w.interval_s, z, note)
        }
    };
    let c = cluster(&z, &params).map_err(|e| anyhow::anyhow!("--{}: {}", e.field, e.reason))?;
    let f = std::fs::File::create(output).with_context(|| format!("creating {}", output.display()))?;
    let mut out = BufWriter::new(f);
    writeln!(out, "meter_id,cluster,confidence,status")?;
    for (i, m) in meters.iter().enumerate() {
        let status = if c.assigned[i] { "assigned" } else { "unassigned" };
        writeln!(out, "{m},{},{:.3},{status}", c.labels[i], c.confidence[i])?;
    }
    out.flush()?;
    let reps = representatives(&z, &c, start, interval_s);
    Ok(serde_json::json!({
        "meters": meters.len(),
        "clusters": c.clusters,
        "chosen_by": c.chosen_by.as_str(),
        "coherence": c.coherence,
        "unassigned": c.assigned.iter().filter(|a| !**a).count(),
        "input": note,
        "leading_eigenvalues": c.eigenvalues,
        "eigen": c.eigen,
        "representatives": reps,
        "output": output.display().to_string(),
    }))
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

fn read_profile_file(path: &Path) -> anyhow::Result<DitherProfile> {
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    DitherProfile::from_json(&text).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

/// A feeder's input files: the profile, the levels window, and the register
/// days inside it (with the count of those outside it).
fn read_feeder(
    levels: &Path,
    profile: &Path,
    registers: Option<&Path>,
) -> anyhow::Result<(DitherProfile, Window, Vec<SumConstraint>, usize)> {
    let profile = read_profile_file(profile)?;
    let w = read_levels(levels, &profile)?;
    let (constraints, skipped) = match registers {
        Some(p) => read_registers(p, &w)?,
        None => (Vec::new(), 0),
    };
    Ok((profile, w, constraints, skipped))
}

/// The utility's full-population recovery of a levels file (automatic rank).
fn recover_window(
    w: &Window,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    alpha: f64,
) -> anyhow::Result<Recovery> {
    let params = RecoveryParams { alpha_kw: alpha, ..RecoveryParams::default() }
        .check()
        .map_err(|e| anyhow::anyhow!("--{}: {}", e.field.replace('_', "-"), e.reason))?;
    let mut report = progress_reporter();
    Ok(recover(&w.levels, profile, constraints, w.layout(), &params, &mut report)?)
}

/// Options of the `audit` command.
pub struct AuditFiles<'a> {
    pub levels: &'a Path,
    pub profile: &'a Path,
    pub captured: &'a Path,
    pub output: &'a Path,
    pub html: Option<&'a Path>,
    pub registers: Option<&'a Path>,
    pub alpha_kw: f64,
    pub seed: u64,
}

/// The whole `audit` command: the utility's recovery of every meter in the
/// levels file, the bootstrap audit of the captured meters on it, and the
/// attackers on the stored levels (direct mode). Returns the JSON summary.
pub fn run_audit(a: &AuditFiles<'_>) -> anyhow::Result<serde_json::Value> {
    use meterveil_shared::audit::{bootstrap, default_curve_counts, direct, AuditConfig, Feeder};
    let (profile, w, constraints, _) = read_feeder(a.levels, a.profile, a.registers)?;
    let captured = read_captured(a.captured, &w)?;
    let rec = recover_window(&w, &profile, &constraints, a.alpha_kw)?;
    let cfg = AuditConfig {
        alpha_kw: a.alpha_kw,
        seed: a.seed,
        utility_rank: meterveil_shared::recovery::RankChoice::Fixed(rec.diagnostics.rank),
        curve_captured: default_curve_counts(w.meters.len()),
        ..AuditConfig::default()
    };
    let mut report = progress_reporter();
    let lc = meterveil_shared::audit::select_rows(&w.levels, &captured, 0..w.levels.cols());
    let feeder = Feeder { base: &rec.x, profile: &profile, layout: w.layout(), uploads: Some(&lc) };
    let mut out =
        bootstrap(&feeder, &captured, &cfg, &mut report).map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
    let uc = nalgebra::DMatrix::from_fn(captured.len(), w.levels.cols(), |r, j| rec.x[(captured[r], j)]);
    let cc: Vec<SumConstraint> = constraints
        .iter()
        .filter_map(|c| {
            captured.iter().position(|&i| i == c.row).map(|r| SumConstraint {
                row: r,
                cols: c.cols.clone(),
                sum_kw: c.sum_kw,
            })
        })
        .collect();
    out.direct = Some(
        direct(&lc, &uc, &cc, &profile, w.layout(), a.alpha_kw)
            .map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?,
    );
    let json = serde_json::to_vec_pretty(&out)?;
    write_atomically(a.output, &json)?;
    if let Some(h) = a.html {
        let title = format!("Privacy audit: {} captured of {} meters", out.captured_meters, out.population);
        write_atomically(h, crate::report::audit_html(&title, &out).as_bytes())?;
    }
    Ok(serde_json::json!({
        "captured": out.captured_meters,
        "meters": out.population,
        "days": out.days,
        "strongest": { "strategy": out.strongest.strategy, "event_f1": out.strongest.event_f1, "nrmse": out.strongest.nrmse },
        "utility": { "nrmse": out.utility.nrmse, "event_f1": out.utility.event_f1 },
        "mechanism": { "mutual_information_bits": out.mechanism.mutual_information_bits, "ldp_epsilon": out.mechanism.ldp_epsilon },
        "output": a.output.display().to_string(),
    }))
}

/// Options of the `calibrate` command.
pub struct CalibrateFiles<'a> {
    pub levels: &'a Path,
    pub profile: &'a Path,
    pub output: &'a Path,
    pub report: Option<&'a Path>,
    pub html: Option<&'a Path>,
    pub registers: Option<&'a Path>,
    pub targets: meterveil_shared::calibrate::Targets,
    pub alpha_kw: f64,
    pub seed: u64,
}

/// The whole `calibrate` command: recovers the feeder, searches the dither, and
/// writes the recommended profile (only when the targets are met) and the report.
pub fn run_calibrate(a: &CalibrateFiles<'_>) -> anyhow::Result<serde_json::Value> {
    use meterveil_shared::calibrate::{calibrate, CalibrationConfig};
    let (profile, w, constraints, _) = read_feeder(a.levels, a.profile, a.registers)?;
    let rec = recover_window(&w, &profile, &constraints, a.alpha_kw)?;
    let cfg = CalibrationConfig {
        alpha_kw: a.alpha_kw,
        seed: a.seed,
        utility_rank: meterveil_shared::recovery::RankChoice::Fixed(rec.diagnostics.rank),
        ..CalibrationConfig::new(a.targets.clone())
    };
    cfg.check(w.meters.len()).map_err(|e| anyhow::anyhow!("--{}: {}", e.field.replace('_', "-"), e.reason))?;
    let mut report = progress_reporter();
    let c = calibrate(&rec.x, &profile, w.layout(), &cfg, &mut report)
        .map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
    if let Some(r) = a.report {
        write_atomically(r, &serde_json::to_vec_pretty(&c)?)?;
    }
    if let Some(h) = a.html {
        write_atomically(h, crate::report::calibration_html("Dither calibration", &c).as_bytes())?;
    }
    if c.meets_targets {
        write_atomically(a.output, &serde_json::to_vec_pretty(&c.recommended)?)?;
    }
    Ok(serde_json::json!({
        "meets_targets": c.meets_targets,
        "message": c.message,
        "recommended": c.recommended,
        "evaluations": c.evaluations,
        "searches": c.searches,
        "output": if c.meets_targets { serde_json::json!(a.output.display().to_string()) } else { serde_json::Value::Null },
    }))
}
