//! Recovery of a feeder's stored levels over a window, as a background job.

use std::collections::HashMap;

use anyhow::Context;
use meterveil_shared::aggregate::{meter_spreads, Spread};
use meterveil_shared::bootstrap::{fit_draws, Fit, FitDraws, StoredBands};
use meterveil_shared::energies::{day_label, meter_energies, Fitted};
use meterveil_shared::mechanism::secure_rng;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{
    band95, recover_from, LevelMatrix, Recovery, RecoveryParams, SumConstraint, ValidRecoveryParams, WarmStart,
};
use meterveil_shared::{DitherProfile, FeederId};

use super::WorkContext;
use crate::clock::now_s;
use crate::jobspec::RecoverSpec;
use crate::store::queue::JobTable;
use crate::store::recoveries::RecoveredRow;

/// Runs the job to completion, recording progress and the outcome in its row.
pub async fn run(state: WorkContext, job_id: String, req: RecoverSpec) {
    if let Err(e) = run_inner(&state, &job_id, &req).await {
        tracing::warn!(job = %job_id, error = %format!("{e:#}"), "recovery job failed");
        let _ = state.store.fail(JobTable::Recovery, &job_id, &format!("{e:#}"), now_s()).await;
    }
}

/// A feeder's stored levels over a window, with what fitting them needs.
pub struct FeederWindow {
    pub meters: Vec<String>,
    pub levels: LevelMatrix,
    pub profile: meterveil_shared::DitherProfile,
    pub version: u32,
    pub constraints: Vec<SumConstraint>,
    pub layout: DayLayout,
}

/// Loads the levels of `feeder` in [from, to) (one profile version) and the
/// register advances that constrain them.
pub async fn load_window(
    store: &crate::store::Store,
    feeder: &FeederId,
    from: i64,
    to: i64,
) -> anyhow::Result<FeederWindow> {
    let rows = store.feeder_levels_between(feeder, from, to).await?;
    let mut versions: Vec<u32> = rows.iter().map(|r| r.3).collect();
    versions.sort_unstable();
    versions.dedup();
    let version = match versions.as_slice() {
        [] => anyhow::bail!("no readings of feeder {feeder} in [{from}, {to})"),
        [v] => *v,
        many => anyhow::bail!(
            "the window holds readings of profile versions {many:?}; recover each version's window separately"
        ),
    };
    let rec = store
        .profiles(feeder)
        .await?
        .into_iter()
        .find(|p| p.version.0 == version)
        .context("profile version of the readings")?;
    let profile = rec.profile;
    let step = i64::from(profile.interval().seconds());
    if from.rem_euclid(step) != 0 || to.rem_euclid(step) != 0 {
        anyhow::bail!("window bounds must be aligned to the {step}-second interval length");
    }
    let meters = store.meters_of(feeder).await?;
    let index: HashMap<String, usize> = meters.iter().enumerate().map(|(i, m)| (m.clone(), i)).collect();
    let cols = ((to - from) / step) as usize;
    let mut levels = LevelMatrix::missing(meters.len(), cols);
    for (m, t, l, _) in &rows {
        if let Some(&i) = index.get(m) {
            levels.set(i, ((t - from) / step) as usize, Some(*l));
        }
    }
    let reads = store.feeder_registers_between(feeder, from, to).await?;
    let constraints =
        crate::settlement::register_constraints(&index, &levels, &reads, from, profile.interval().seconds());
    let layout = DayLayout { window_start: from, interval_s: profile.interval().seconds() };
    Ok(FeederWindow { meters, levels, profile, version, constraints, layout })
}

async fn run_inner(s: &WorkContext, job_id: &str, req: &RecoverSpec) -> anyhow::Result<()> {
    let store = &s.store;
    store.set_progress(JobTable::Recovery, job_id, 0.0, "loading levels", now_s()).await?;
    let FeederWindow { meters, levels, profile, version, constraints, layout } =
        load_window(store, &req.feeder_id, req.from, req.to).await?;
    let step = i64::from(profile.interval().seconds());
    let cols = levels.cols();
    let params = RecoveryParams { rank: req.rank.choice(), alpha_kw: req.alpha_kw, ..Default::default() }
        .check()
        .map_err(|e| anyhow::anyhow!("{e}"))?;
    // A settlement run starts from the latest run of each day its window
    // holds (each run keeps only its own day's estimates).
    let (warm_from, warm) = match (&req.warm_from, &req.settles) {
        (Some(w), _) => {
            let days = [(w.clone(), None)];
            (vec![w.clone()], Some(warm_start(store, &days, &meters, req.from, step, cols).await?))
        }
        (None, Some(_)) => {
            let days: Vec<(String, Option<i64>)> = store
                .latest_runs_between(&req.feeder_id, req.from, req.to)
                .await?
                .into_iter()
                .map(|(day, job)| (job, Some(day)))
                .collect();
            let jobs = days.iter().map(|d| d.0.clone()).collect();
            let warm = if days.is_empty() {
                None
            } else {
                Some(warm_start(store, &days, &meters, req.from, step, cols).await?)
            };
            (jobs, warm)
        }
        (None, None) => (Vec::new(), None),
    };
    let day_inputs = match &req.settles {
        Some(run) => Some(super::settle::inputs(store, req, run, &meters, &levels, version, step).await?),
        None => None,
    };

    let (draws, names) = (req.band_draws as usize, meters.clone());
    let settled = req.settles.as_ref().map(|r| (r.day_start, req.from));
    let (rec, n_constraints, bands, day_estimates) =
        super::run_reporting(s, JobTable::Recovery, job_id, move |progress| {
            let _span = tracing::info_span!("recovery").entered();
            let report = &mut |stage: &str, f: f64| progress(stage, f);
            let rec = recover_from(&levels, &profile, &constraints, layout, &params, warm.as_ref(), report)
                .map_err(|e| anyhow::anyhow!("{e}"))?;
            if draws > 0 {
                progress("bands' bootstrap", 0.99);
            }
            let fitted = (&levels, &profile, constraints.as_slice(), layout);
            let (bands, day_estimates) = bands_and_day(&rec, fitted, &params, draws, names, settled)?;
            Ok((rec, constraints.len(), bands, day_estimates))
        })
        .await?;
    let mut out = rows_of(&rec, &meters, req, step);
    let mut diag = serde_json::to_value(&rec.diagnostics)?;
    diag["register_days"] = n_constraints.into();
    diag["meters"] = meters.len().into();
    diag["intervals"] = cols.into();
    diag["band_draws"] = req.band_draws.into();
    match warm_from.as_slice() {
        [] => {}
        [w] => diag["warm_from"] = w.as_str().into(),
        many => diag["warm_from"] = many.into(),
    }
    let frozen = match (&req.settles, day_inputs) {
        (Some(run), Some(day)) => {
            let estimates = day_estimates.unwrap_or_default();
            let frozen = super::settle::freeze(store, req, run, day, (&mut out, &estimates), step, &mut diag).await?;
            Some((run.run_id.as_str(), frozen))
        }
        _ => None,
    };
    let run = frozen.as_ref().map(|(id, days)| (*id, days.as_str()));
    if let Some(run) = &req.settles {
        // A settlement run keeps its own day's estimates only.
        out.retain(|r| (run.day_start..run.day_start + 86_400).contains(&r.interval_start));
    }
    if let Some(body) = &bands {
        store.put_bands(job_id, body).await?;
    }
    store.finish_job(job_id, version, &out, &diag, run, now_s()).await?;
    Ok(())
}

/// The job's rows: every meter's estimate, flag and first-order band per interval.
fn rows_of(rec: &Recovery, meters: &[String], req: &RecoverSpec, step: i64) -> Vec<RecoveredRow> {
    let cols = rec.x.ncols();
    let mut out = Vec::with_capacity(meters.len() * cols);
    for (i, m) in meters.iter().enumerate() {
        for j in 0..cols {
            let (x, sd) = (rec.x[(i, j)], rec.std_kw[(i, j)]);
            let (lo, hi) = band95(x, sd, req.alpha_kw);
            out.push(RecoveredRow {
                meter_id: m.clone(),
                interval_start: req.from + j as i64 * step,
                kw: x,
                flag: rec.flag(i, j).as_str(),
                kw_low: lo,
                kw_high: hi,
            });
        }
    }
    out
}

/// A recovery's band model: each meter's spread and `draws` refits of the
/// bands' bootstrap (none for 0).
fn band_model(
    rec: &Recovery,
    (levels, profile, constraints, layout): (&LevelMatrix, &DitherProfile, &[SumConstraint], DayLayout),
    params: &ValidRecoveryParams,
    draws: usize,
) -> anyhow::Result<(Vec<Spread>, FitDraws)> {
    let spreads = meter_spreads(&rec.x, levels, profile, layout.interval_s);
    if draws == 0 {
        return Ok((spreads, FitDraws::default()));
    }
    let (x, rank) = (&rec.x, rec.diagnostics.rank);
    let fit = Fit { x, rank, levels, profile, constraints, layout, spreads: &spreads, params };
    // Like the dither, the draws come from the operating system's generator.
    let fd = fit_draws(&fit, draws, &mut secure_rng()).map_err(|e| anyhow::anyhow!("bands' bootstrap: {e}"))?;
    Ok((spreads, fd))
}

/// After the fit: its band model as stored (`shared::bootstrap::StoredBands`,
/// JSON; none for 0 draws) and, for a settlement run (`settled`: its day and
/// the window's start), each meter's estimate of the settled day.
fn bands_and_day(
    rec: &Recovery,
    fitted: (&LevelMatrix, &DitherProfile, &[SumConstraint], DayLayout),
    params: &ValidRecoveryParams,
    draws: usize,
    meters: Vec<String>,
    settled: Option<(i64, i64)>,
) -> anyhow::Result<(Option<String>, Option<crate::settlement::DayEstimates>)> {
    if draws == 0 && settled.is_none() {
        return Ok((None, None));
    }
    let (spreads, fd) = band_model(rec, fitted, params, draws)?;
    let day = settled.map(|(day, from)| settled_day(rec, fitted, (&spreads, &fd), &meters, day, from));
    let bands = (draws > 0).then(|| serde_json::to_string(&StoredBands::new(meters, &spreads, &fd))).transpose()?;
    Ok((bands, day))
}

/// Each meter's energy of the settled UTC day `day` from its levels, with its
/// 95% band from the band model (`shared::energies`), the register reads of
/// the window applied.
fn settled_day(
    rec: &Recovery,
    (levels, profile, constraints, layout): (&LevelMatrix, &DitherProfile, &[SumConstraint], DayLayout),
    (spreads, draws): (&[Spread], &FitDraws),
    meters: &[String],
    day: i64,
    from: i64,
) -> crate::settlement::DayEstimates {
    let fitted = Fitted { x: &rec.x, levels, start: from, interval_s: layout.interval_s, draws };
    // Every day of the window: a weekly read's other days share its total.
    let cells = meter_energies(fitted, profile, spreads, constraints, &day_label(None));
    let mut out = crate::settlement::day_estimates(&cells, meters);
    out.retain(|k, _| k.1 == day);
    out
}

/// The start of a rolling run: finished recoveries' estimates (each whole,
/// or only its day from the given start) moved onto this window's meters and
/// intervals, at the rank of the last; new days take the same weekday's
/// estimates (or the solver's cold start), new meters the cold start.
async fn warm_start(
    store: &crate::store::Store,
    sources: &[(String, Option<i64>)],
    meters: &[String],
    from: i64,
    step: i64,
    cols: usize,
) -> anyhow::Result<WarmStart> {
    let index: HashMap<&str, usize> = meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let mut x = nalgebra::DMatrix::from_element(meters.len(), cols, f64::NAN);
    let mut rank = 0;
    for (from_job, day) in sources {
        let job = store.job(from_job).await?.with_context(|| format!("warm start {from_job}: no such recovery"))?;
        rank = job.diagnostics.as_ref().and_then(|d| d["rank"].as_u64()).unwrap_or(0) as usize;
        anyhow::ensure!(job.state == "done" && rank > 0, "warm start {from_job}: not a finished recovery");
        for r in store.job_rows(from_job, None).await? {
            let j = (r.interval_start - from).div_euclid(step);
            let in_day = day.is_none_or(|d| (d..d + 86_400).contains(&r.interval_start));
            if let (Some(&i), true, true) = (index.get(r.meter_id.as_str()), (0..cols as i64).contains(&j), in_day) {
                x[(i, j as usize)] = r.kw;
            }
        }
    }
    let week = (7 * 86_400 / step) as usize;
    Ok(WarmStart::from_partial(x, rank, week))
}
