//! Load-shape clustering of the profiles of finished recovery jobs.

use meterveil_shared::cluster::{cluster, representation, representatives, ClusterParams, CLUSTER_RANK};
use nalgebra::DMatrix;
use serde_json::json;

use super::WorkContext;
use crate::clock::now_s;
use crate::jobspec::{ClusterSpec, JobSpec};
use crate::store::analyses::Assignment;
use crate::store::queue::JobTable;

pub async fn run(state: WorkContext, job_id: String, req: ClusterSpec) {
    if let Err(e) = run_inner(&state, &job_id, &req).await {
        tracing::warn!(job = %job_id, error = %format!("{e:#}"), "clustering job failed");
        let _ = state.store.fail(JobTable::Analysis, &job_id, &format!("{e:#}"), now_s()).await;
    }
}

/// The recovered profiles of a clustering's recovery jobs over their common window.
struct Recovered {
    /// (meter id, feeder id) of each row of `x`.
    meters: Vec<(String, String)>,
    x: DMatrix<f64>,
    from: i64,
    to: i64,
    interval_s: u32,
    /// Each recovery's id, feeder and service limit, for the clustering fit.
    fits: Vec<(String, String, f64)>,
}

async fn load_recovered(s: &WorkContext, req: &ClusterSpec) -> anyhow::Result<Recovered> {
    let mut meters: Vec<(String, String)> = Vec::new();
    let mut values: Vec<f64> = Vec::new();
    let mut window: Option<(i64, i64)> = None;
    let mut cols = 0usize;
    // Each recovery's feeder and service limit, for the clustering fit below.
    let mut fits: Vec<(String, String, f64)> = Vec::with_capacity(req.recovery_jobs.len());
    for id in &req.recovery_jobs {
        let job = s.store.job(id).await?.ok_or_else(|| anyhow::anyhow!("recovery job {id} does not exist"))?;
        let alpha = match JobSpec::from_stored(
            "recover",
            &job.params,
            Some(&job.feeder_id),
            Some((job.window_start, job.window_end)),
        ) {
            Ok(JobSpec::Recover(r)) => r.alpha_kw,
            _ => anyhow::bail!("recovery job {id}'s stored parameters do not parse"),
        };
        fits.push((id.clone(), job.feeder_id.clone(), alpha));
        anyhow::ensure!(job.state == "done", "recovery job {id} is {}, not done", job.state);
        let w = (job.window_start, job.window_end);
        anyhow::ensure!(
            window.is_none_or(|v| v == w),
            "recovery job {id} covers [{}, {}), unlike the first job's window",
            w.0,
            w.1
        );
        window = Some(w);
        let rows = s.store.job_rows(id, None).await?;
        let mut last: Option<&str> = None;
        for r in &rows {
            if last != Some(r.meter_id.as_str()) {
                meters.push((r.meter_id.clone(), job.feeder_id.clone()));
                last = Some(r.meter_id.as_str());
            }
            values.push(r.kw);
        }
        cols = if meters.is_empty() { 0 } else { values.len() / meters.len() };
    }
    let (from, to) = window.ok_or_else(|| anyhow::anyhow!("no recovery jobs given"))?;
    anyhow::ensure!(
        meters.len() >= 2 && cols >= 2,
        "{} meters with {cols} intervals: too few to cluster",
        meters.len()
    );
    anyhow::ensure!(values.len() == meters.len() * cols, "recovered rows do not form a full meters × intervals table");
    let interval_s = ((to - from) / cols as i64) as u32;
    let x = DMatrix::from_row_slice(meters.len(), cols, &values);
    Ok(Recovered { meters, x, from, to, interval_s, fits })
}

async fn run_inner(s: &WorkContext, job_id: &str, req: &ClusterSpec) -> anyhow::Result<()> {
    s.store.set_progress(JobTable::Analysis, job_id, 0.0, "loading recovered profiles", now_s()).await?;
    let Recovered { meters, x, from, to, interval_s, fits } = load_recovered(s, req).await?;
    let cols = x.ncols();
    // The clustering representation: each recovery's levels fitted again at the
    // clustering rank (the profiles' own rank is chosen for accuracy, and below
    // the number of classes the classes are gone).
    let mut windows = Vec::with_capacity(fits.len());
    for (id, feeder, alpha) in &fits {
        let feeder = meterveil_shared::FeederId::parse(feeder)
            .map_err(|e| anyhow::anyhow!("feeder of recovery job {id}: {e}"))?;
        windows.push((super::recover::load_window(&s.store, &feeder, from, to).await?, *alpha, feeder));
    }
    // Representative days are local days of the feeders' zone (UTC when they differ).
    let mut zones = std::collections::BTreeSet::new();
    for (_, _, feeder) in &windows {
        zones.insert(s.store.feeder_time_zone(feeder).await?.unwrap_or_else(|| "UTC".into()));
    }
    let zone_name = if zones.len() == 1 { zones.pop_first().unwrap_or_default() } else { "UTC".into() };
    let tz: meterveil_shared::Tz = zone_name.parse().unwrap_or(meterveil_shared::Tz::UTC);
    let params = ClusterParams { clusters: req.clusters, ..ClusterParams::default() };
    let order: Vec<String> = meters.iter().map(|m| m.0.clone()).collect();
    let (c, reps, fit_stops) = super::run_reporting(s, JobTable::Analysis, job_id, move |progress| {
        let mut rows: std::collections::HashMap<String, Vec<f64>> = Default::default();
        let mut fit_stops = Vec::with_capacity(windows.len());
        let total = windows.len().max(1) as f64;
        for (done, (w, alpha, feeder)) in windows.iter().enumerate() {
            let base = 0.8 * done as f64 / total;
            let (z, fit) = representation(&w.levels, &w.profile, &w.constraints, w.layout, *alpha, &mut |_, f| {
                progress("fitting at the clustering rank", base + 0.8 * f / total)
            })
            .map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
            fit_stops.push(
                serde_json::json!({"feeder_id": feeder.as_str(), "iterations": fit.iterations, "stop": fit.stop}),
            );
            for (i, m) in w.meters.iter().enumerate() {
                rows.insert(m.clone(), z.row(i).iter().copied().collect());
            }
        }
        let z = DMatrix::from_fn(order.len(), cols, |i, j| rows.get(&order[i]).map_or(0.0, |r| r[j]));
        progress("clustering", 0.85);
        let c = cluster(&z, &params).map_err(|e| anyhow::anyhow!("{}: {}", e.field, e.reason))?;
        let reps = representatives(&x, &c, (from, tz), interval_s);
        Ok((c, reps, fit_stops))
    })
    .await?;
    let assignments: Vec<Assignment> = meters
        .iter()
        .enumerate()
        .map(|(i, (m, f))| Assignment {
            meter_id: m.clone(),
            feeder_id: f.clone(),
            cluster: c.labels[i] as i64,
            confidence: c.confidence[i],
        })
        .collect();
    let result = json!({
        "meters": meters.len(),
        "clusters": c.clusters,
        "chosen_by": c.chosen_by.as_str(),
        "coherence": c.coherence,
        "unassigned": c.assigned.iter().filter(|a| !**a).count(),
        "clustering_rank": CLUSTER_RANK,
        "leading_eigenvalues": c.eigenvalues,
        "eigen": c.eigen,
        "fits": fit_stops,
        "window_start": from,
        "window_end": to,
        "interval_s": interval_s,
        "time_zone": tz.name(),
        "recovery_jobs": req.recovery_jobs,
        "representatives": reps,
    });
    s.store.finish_analysis(job_id, &result, &assignments, now_s()).await?;
    Ok(())
}
