//! File mode for analysts: `utility-service recover` reads levels, a profile and
//! optional register energies from files, and writes the recovered profiles.
//!
//! - LEVELS.csv: header `meter_id,interval_start,level` (any column order; UTC
//!   epoch seconds; absent rows are missing readings).
//! - PROFILE.json: `{"noise":…,"scale_kw":…,"boundaries_kw":[…],"interval_s":900}`.
//! - REG.csv: header `meter_id,day_start,wh`: a meter's energy over one UTC day.
//! - OUT.csv: `meter_id,interval_start,kw,flag,kw_low,kw_high`, every meter and
//!   interval of the window (the span from the earliest to the latest level).
//! - GROUPS.csv (`aggregate`): `meter_id,group`; AGG.csv:
//!   `group,interval_start,kw,kw_low,kw_high,meters`.

mod aggregate;
mod files;

pub use aggregate::{run_aggregate, AggregateFiles};

use std::path::Path;

use meterveil_shared::recovery::{recover, Recovery, RecoveryParams, SumConstraint};
use meterveil_shared::DitherProfile;

pub use files::{
    read_captured, read_levels, read_profile_file, read_profiles, read_registers, write_atomically, write_clusters,
    write_recovery, InputError, Profiles, Window,
};

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
        "atypical": d.atypical,
        "outage_intervals": d.outage_intervals,
        "infeasible_constraints": d.infeasible_constraints,
        "wall_s": d.wall_s,
        "output": output.display().to_string(),
    }))
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
    write_clusters(output, &meters, &c)?;
    let reps = representatives(&z, &c, (start, meterveil_shared::Tz::UTC), interval_s);
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
    pub tariff: Option<&'a Path>,
    pub alpha_kw: f64,
    pub seed: u64,
}

/// The whole `calibrate` command: recovers the feeder, searches the dither, and
/// writes the recommended profile (only when the targets are met) and the report.
pub fn run_calibrate(a: &CalibrateFiles<'_>) -> anyhow::Result<serde_json::Value> {
    use meterveil_shared::calibrate::{calibrate, CalibrationConfig};
    if a.targets.band_energy_error_max.is_some() && a.tariff.is_none() {
        anyhow::bail!("--max-band-error: needs the feeder's tariff calendar (--tariff)");
    }
    let tariff = a.tariff.map(aggregate::read_calendar).transpose()?;
    let (profile, w, constraints, _) = read_feeder(a.levels, a.profile, a.registers)?;
    let rec = recover_window(&w, &profile, &constraints, a.alpha_kw)?;
    let cfg = CalibrationConfig {
        tariff,
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
