//! Privacy audits and dither calibrations of a feeder, over a finished recovery
//! job: its recovered profiles are the bootstrap's base, its window and profile
//! version say which stored levels the direct mode attacks.

use std::collections::HashMap;

use anyhow::Context;
use meterveil_shared::audit::{bootstrap, default_curve_counts, direct, select_rows, AuditConfig, Feeder};
use meterveil_shared::calibrate::{calibrate, CalibrationConfig};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{LevelMatrix, RankChoice, SumConstraint};
use meterveil_shared::tariff::TariffCalendar;
use meterveil_shared::{DitherProfile, FeederId};
use nalgebra::DMatrix;

use super::WorkContext;
use crate::clock::now_s;
use crate::jobspec::{AuditSpec, CalibrateSpec};
use crate::store::queue::JobTable;

/// A finished recovery, loaded back for analysis.
struct Recovered {
    feeder: FeederId,
    meters: Vec<String>,
    x: DMatrix<f64>,
    layout: DayLayout,
    from: i64,
    to: i64,
    profile: DitherProfile,
    rank: usize,
}

async fn load(s: &WorkContext, recovery_job: &str) -> anyhow::Result<Recovered> {
    let job =
        s.store.job(recovery_job).await?.with_context(|| format!("recovery job {recovery_job} does not exist"))?;
    anyhow::ensure!(job.state == "done", "recovery job {recovery_job} is {}, not done", job.state);
    let feeder = FeederId::parse(&job.feeder_id).map_err(|e| anyhow::anyhow!("{e}"))?;
    let version = job.profile_version.context("the recovery job has no profile version")?;
    let profile = s
        .store
        .profiles(&feeder)
        .await?
        .into_iter()
        .find(|p| i64::from(p.version.0) == version)
        .context("the recovery's profile version")?
        .profile;
    let rows = s.store.job_rows(recovery_job, None).await?;
    let mut meters: Vec<String> = Vec::new();
    let mut values = Vec::with_capacity(rows.len());
    for r in &rows {
        if meters.last() != Some(&r.meter_id) {
            meters.push(r.meter_id.clone());
        }
        values.push(r.kw);
    }
    anyhow::ensure!(!meters.is_empty() && values.len() % meters.len() == 0, "the recovery's rows are not a full table");
    let cols = values.len() / meters.len();
    let rank = job.diagnostics.as_ref().and_then(|d| d["rank"].as_u64()).unwrap_or(10) as usize;
    Ok(Recovered {
        feeder,
        x: DMatrix::from_row_slice(meters.len(), cols, &values),
        meters,
        layout: DayLayout { window_start: job.window_start, interval_s: profile.interval().seconds() },
        from: job.window_start,
        to: job.window_end,
        profile,
        rank,
    })
}

pub async fn run_audit(state: WorkContext, job_id: String, req: AuditSpec) {
    if let Err(e) = audit_inner(&state, &job_id, &req).await {
        tracing::warn!(job = %job_id, error = %format!("{e:#}"), "audit job failed");
        let _ = state.store.fail(JobTable::Analysis, &job_id, &format!("{e:#}"), now_s()).await;
    }
}

async fn audit_inner(s: &WorkContext, job_id: &str, req: &AuditSpec) -> anyhow::Result<()> {
    s.store.set_progress(JobTable::Analysis, job_id, 0.0, "loading the recovery", now_s()).await?;
    let r = load(s, &req.recovery_job).await?;
    let index: HashMap<String, usize> = r.meters.iter().enumerate().map(|(i, m)| (m.clone(), i)).collect();
    let captured: Vec<usize> = req
        .captured
        .iter()
        .map(|m| {
            index
                .get(m.as_str())
                .copied()
                .with_context(|| format!("meter {m} is not in recovery job {}", req.recovery_job))
        })
        .collect::<anyhow::Result<_>>()?;
    // The stored levels and register days of the captured meters, for the direct mode.
    let step = i64::from(r.layout.interval_s);
    let cols = r.x.ncols();
    let mut levels = LevelMatrix::missing(r.meters.len(), cols);
    for (m, t, l, _) in s.store.feeder_levels_between(&r.feeder, r.from, r.to).await? {
        if let Some(&i) = index.get(&m) {
            levels.set(i, ((t - r.from) / step) as usize, Some(l));
        }
    }
    let reads = s.store.feeder_registers_between(&r.feeder, r.from, r.to).await?;
    let cons = crate::settlement::register_constraints(&index, &levels, &reads, r.from, r.layout.interval_s);
    let cc: Vec<SumConstraint> = cons
        .iter()
        .filter_map(|c| {
            captured.iter().position(|&i| i == c.row).map(|p| SumConstraint {
                row: p,
                cols: c.cols.clone(),
                sum_kw: c.sum_kw,
            })
        })
        .collect();
    let tz =
        s.store.feeder_time_zone(&r.feeder).await?.and_then(|z| z.parse().ok()).unwrap_or(meterveil_shared::Tz::UTC);
    let cfg = AuditConfig {
        seed: req.seed,
        utility_rank: RankChoice::Fixed(r.rank),
        curve_captured: if req.curves { default_curve_counts(r.meters.len()) } else { Vec::new() },
        curve_days: if req.curves { AuditConfig::default().curve_days } else { Vec::new() },
        tz,
        ..AuditConfig::default()
    };
    let profile = req.register_period.map_or_else(|| r.profile.clone(), |p| r.profile.with_register_period(p));
    let report = super::run_reporting(s, JobTable::Analysis, job_id, move |progress| {
        let lc = select_rows(&levels, &captured, 0..cols);
        let feeder = Feeder { base: &r.x, profile: &profile, layout: r.layout, uploads: Some(&lc) };
        let mut out =
            bootstrap(&feeder, &captured, &cfg, progress).map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
        let uc = DMatrix::from_fn(captured.len(), cols, |p, j| r.x[(captured[p], j)]);
        out.direct = Some(
            direct(&lc, &uc, &cc, &r.profile, r.layout, cfg.alpha_kw)
                .map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?,
        );
        Ok(out)
    })
    .await?;
    let mut result = serde_json::to_value(&report)?;
    result["feeder_id"] = r.feeder.as_str().into();
    result["recovery_job"] = req.recovery_job.clone().into();
    result["captured"] = serde_json::json!(req.captured);
    s.store.finish_analysis(job_id, &result, &[], now_s()).await?;
    Ok(())
}

pub async fn run_calibration(state: WorkContext, job_id: String, req: CalibrateSpec) {
    if let Err(e) = calibration_inner(&state, &job_id, &req).await {
        tracing::warn!(job = %job_id, error = %format!("{e:#}"), "calibration job failed");
        let _ = state.store.fail(JobTable::Analysis, &job_id, &format!("{e:#}"), now_s()).await;
    }
}

async fn calibration_inner(s: &WorkContext, job_id: &str, req: &CalibrateSpec) -> anyhow::Result<()> {
    s.store.set_progress(JobTable::Analysis, job_id, 0.0, "loading the recovery", now_s()).await?;
    let r = load(s, &req.recovery_job).await?;
    let tz =
        s.store.feeder_time_zone(&r.feeder).await?.and_then(|z| z.parse().ok()).unwrap_or(meterveil_shared::Tz::UTC);
    // The band-energy figure is measured on the feeder's latest tariff calendar.
    let tariff = match s.store.tariffs(&r.feeder).await?.pop() {
        Some(t) => Some((
            t.version,
            TariffCalendar::parse(&t.body).map_err(|e| anyhow::anyhow!("stored tariff version {}: {e}", t.version))?,
        )),
        None => None,
    };
    let cfg = CalibrationConfig {
        seed: req.seed,
        utility_rank: RankChoice::Fixed(r.rank),
        register_periods: req.register_periods.clone(),
        tz,
        tariff: tariff.as_ref().map(|t| t.1.clone()),
        ..CalibrationConfig::new(req.targets.clone())
    };
    cfg.check(r.meters.len()).map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
    let (x, profile, layout) = (r.x.clone(), r.profile.clone(), r.layout);
    let c = super::run_reporting(s, JobTable::Analysis, job_id, move |progress| {
        calibrate(&x, &profile, layout, &cfg, progress).map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))
    })
    .await?;
    let recommended = DitherProfile::try_from(c.recommended.clone()).map_err(|e| anyhow::anyhow!("{e}"))?;
    let mut result = serde_json::to_value(&c)?;
    result["feeder_id"] = r.feeder.as_str().into();
    result["recovery_job"] = req.recovery_job.clone().into();
    if let Some((version, _)) = &tariff {
        result["tariff_version"] = (*version).into();
    }
    let publish = (req.publish && c.meets_targets).then_some((&r.feeder, &recommended));
    s.store.finish_calibration(job_id, &result, publish, now_s()).await?;
    Ok(())
}
