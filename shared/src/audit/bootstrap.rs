//! The parametric bootstrap: a simulated copy of the feeder with events
//! injected into the captured meters (and into tuning meters elsewhere), the
//! utility's recovery of all of it, and every attacker on the captured meters,
//! scored against the simulation's truth; its report and configuration.

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use super::{
    attack, best_index, event_figures, event_posterior, inject_events, mechanism_figures, median_daily_energy_error,
    nrmse, redraw_levels, register_sums, score, score_all_thresholds, score_detector, select_rows, standard_event_mix,
    strongest, whole_days, Attacker, Detector, EventCounts, EventKind, InjectedEvent, MechanismFigures, Strategy,
    StrategyFigures, Strongest, THRESHOLDS_KW,
};
use crate::error::FieldError;
use crate::mechanism::log_likelihood;
use crate::profile::DitherProfile;
use crate::recovery::outage::DayLayout;
use crate::recovery::{recover, LevelMatrix, RankChoice, RecoveryParams};

/// The utility's own figures on the captured meters, from the full-feeder recovery.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct UtilityFigures {
    pub nrmse: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub habit_nrmse: Option<f64>,
    pub daily_energy_error: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_f1: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_f1_at_documented_threshold: Option<f64>,
    pub population: usize,
    pub rank: usize,
}

/// One point of a curve: the strongest attacker with `captured` meters and
/// `days` days of history, beside the utility on the same meters.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct CurvePoint {
    pub captured: usize,
    pub days: usize,
    pub strongest_nrmse: f64,
    pub strongest_event_f1: f64,
    pub strongest_event_strategy: String,
    pub utility_nrmse: f64,
    pub utility_event_f1: f64,
}

/// Attackers on the stored levels, compared with the utility's recovery.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct DirectFigures {
    pub strategies: Vec<StrategyFigures>,
    pub strongest: Strongest,
    pub note: String,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct AuditReport {
    pub mode: String,
    pub captured_meters: usize,
    pub population: usize,
    pub days: usize,
    pub interval_s: u32,
    pub profile: crate::DitherProfileSpec,
    pub events_injected: usize,
    pub event_mix: Vec<EventKind>,
    pub strategies: Vec<StrategyFigures>,
    pub strongest: Strongest,
    pub utility: UtilityFigures,
    pub mechanism: MechanismFigures,
    pub curve_captured: Vec<CurvePoint>,
    pub curve_days: Vec<CurvePoint>,
    /// The check of each captured meter's base profile against its own uploads.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub base_checks: Vec<BaseCheck>,
    /// Simulated households, other than the captured ones, on which each
    /// strategy's threshold was tuned for its `f1_tuned_elsewhere`.
    #[serde(default)]
    pub tuning_meters: usize,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub direct: Option<DirectFigures>,
    pub assumptions: Vec<String>,
    pub caution: String,
}

/// Captured-meter counts of the curve for a feeder of `m` meters: one meter,
/// then 1, 2, 5 and 10% of the feeder.
pub fn default_curve_counts(m: usize) -> Vec<usize> {
    let mut v: Vec<usize> =
        [0.0, 0.01, 0.02, 0.05, 0.10].iter().map(|f| ((f * m as f64).ceil() as usize).max(1)).collect();
    v.dedup();
    v
}

#[derive(Debug, Clone, PartialEq)]
pub struct AuditConfig {
    pub alpha_kw: f64,
    pub events: Vec<EventKind>,
    /// Seed of the bootstrap's events and dither (an audit is a simulation; its
    /// random numbers are reproducible on purpose).
    pub seed: u64,
    /// Rank choice of the utility's recovery.
    pub utility_rank: RankChoice,
    /// Captured-meter counts of the first curve: the captured set's first
    /// meters, then other meters of the feeder (events are injected into all).
    pub curve_captured: Vec<usize>,
    /// Days of history of the second curve.
    pub curve_days: Vec<usize>,
    /// The attacker's strategies (all of them unless a test asks otherwise).
    pub strategies: Vec<Strategy>,
    /// Other meters of the feeder, given events of their own, on which each
    /// strategy's threshold is tuned for the less flattering figure.
    pub tuning_meters: usize,
    /// The feeder's time zone: weekly and monthly register periods follow it.
    pub tz: crate::Tz,
}

/// The audit's default seed; calibrations use [`crate::calibrate::DEFAULT_SEED`].
pub const DEFAULT_SEED: u64 = 11;

impl Default for AuditConfig {
    fn default() -> Self {
        Self {
            alpha_kw: crate::recovery::DEFAULT_ALPHA_KW,
            events: standard_event_mix(),
            seed: DEFAULT_SEED,
            utility_rank: RecoveryParams::default().rank,
            curve_captured: Vec::new(),
            curve_days: vec![7, 14, 21, 28],
            strategies: Strategy::ALL.to_vec(),
            tuning_meters: 2,
            tz: crate::Tz::UTC,
        }
    }
}

impl AuditConfig {
    /// Checks every field, naming the first bad one.
    pub fn check(&self) -> Result<(), FieldError> {
        if !(self.alpha_kw.is_finite() && self.alpha_kw > 0.0 && self.alpha_kw <= 10_000.0) {
            return Err(FieldError::new("alpha_kw", "must be a positive number of kW up to 10000"));
        }
        if self.events.is_empty() || self.events.len() > 50 {
            return Err(FieldError::new("events", "name from 1 to 50 event kinds"));
        }
        for (i, e) in self.events.iter().enumerate() {
            let ok = e.kw.is_finite()
                && e.kw > 0.0
                && (1..=24 * 60).contains(&e.minutes)
                && (0.0..24.0).contains(&e.earliest_h)
                && e.earliest_h <= e.latest_h
                && e.latest_h < 24.0
                && (0.0..=1.0).contains(&e.daily_probability);
            if !ok {
                return Err(FieldError::new(
                    format!("events[{i}]"),
                    "needs kw > 0, minutes from 1 to 1440, 0 ≤ earliest_h ≤ latest_h < 24 and a probability in [0, 1]",
                ));
            }
        }
        if self.strategies.is_empty() {
            return Err(FieldError::new("strategies", "name at least one strategy"));
        }
        if self.curve_captured.len() > 20 {
            return Err(FieldError::new("curve_captured", "at most 20 points"));
        }
        if self.curve_days.len() > 20 {
            return Err(FieldError::new("curve_days", "at most 20 points"));
        }
        if self.tuning_meters > 20 {
            return Err(FieldError::new("tuning_meters", "must be at most 20"));
        }
        Ok(())
    }
}

pub const CAUTION: &str = "These figures are estimates from simulated attacks under stated assumptions (the attacker \
knows the mechanism and the profile, not the dither; events are injected from a documented mix), not a legal privacy \
guarantee. A stronger attack than those tried here may exist. Dithering is a privacy measure with limits: a long \
history still reveals a household's habits. Obligations follow local regulation and the utility's privacy officer.";

fn assumptions(profile: &DitherProfile) -> Vec<String> {
    let mut a = vec![
        "The eavesdropper holds every upload of the captured meters over the window and knows the dither profile and the event mix.".to_owned(),
        "Events are scored on injected appliance events (see event_mix), added to the utility's recovered profiles; a recovered profile is smooth and holds none of its own. A captured meter's recovered profile that predicts more high readings than the meter sent is replaced by a per-slot estimate from its own uploads (see base_checks).".to_owned(),
        "The strongest attacker's event F1 uses the best threshold of each strategy's grid: an attacker that knows the mechanism can tune it by simulation. The F1 at a threshold tuned on other simulated households is reported beside it.".to_owned(),
    ];
    if profile.send_registers() {
        a.push(format!(
            "The profile sends {} register reads: the eavesdropper captures them too, so each whole period's energy of the captured meters is exact to it.",
            profile.register_period().as_str()
        ));
    }
    a
}

fn figures_on(x: &DMatrix<f64>, rows: &[usize], cols: std::ops::Range<usize>) -> DMatrix<f64> {
    DMatrix::from_fn(rows.len(), cols.len(), |r, c| x[(rows[r], cols.start + c)])
}

/// Events of `rows` within `cols`, re-indexed to positions in `rows` and columns from `cols.start`.
pub fn events_on(events: &[InjectedEvent], rows: &[usize], cols: std::ops::Range<usize>) -> Vec<InjectedEvent> {
    events
        .iter()
        .filter_map(|e| {
            let r = rows.iter().position(|&i| i == e.row)?;
            (e.start >= cols.start && e.start + e.len <= cols.end).then_some(InjectedEvent {
                row: r,
                start: e.start - cols.start,
                ..*e
            })
        })
        .collect()
}

/// A captured meter's base profile checked against its own uploads: the share
/// of readings at the top level that the base predicts under the mechanism,
/// beside the share the meter sent.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct BaseCheck {
    /// Position in the captured set.
    pub captured: usize,
    pub predicted_top_share: f64,
    pub uploaded_top_share: f64,
    /// The base predicted more high readings than the meter sent, beyond
    /// sampling error, and was replaced by the per-slot estimate from the uploads.
    pub replaced: bool,
}

/// Checks one meter's base (kW per interval) against its uploads. For each
/// upper tail (levels ≥ l) the base's expected count is compared with the
/// uploaded count; the base is implausible when it predicts more than
/// 3 standard deviations plus 1% of readings more than were sent. A base
/// predicting fewer high readings than were sent is expected: the uploads hold
/// the household's own events, which a recovered profile smooths away.
pub fn check_base(base: &[f64], uploads: &LevelMatrix, row: usize, profile: &DitherProfile) -> BaseCheck {
    let k = profile.levels();
    let mut expected = vec![0.0f64; k];
    let mut sent = vec![0.0f64; k];
    let mut n = 0.0;
    for (j, &x) in base.iter().enumerate().take(uploads.cols()) {
        let Some(l) = uploads.get(row, j) else { continue };
        n += 1.0;
        sent[usize::from(l)] += 1.0;
        for (q, e) in expected.iter_mut().enumerate() {
            *e += log_likelihood(profile, q as u8, x).0.exp();
        }
    }
    let tail = |v: &[f64], l: usize| v[l..].iter().sum::<f64>();
    let replaced = n > 0.0
        && (1..k).any(|l| {
            let (e, o) = (tail(&expected, l), tail(&sent, l));
            e - o > 3.0 * e.max(1.0).sqrt() + 0.01 * n
        });
    BaseCheck {
        captured: row,
        predicted_top_share: if n > 0.0 { expected[k - 1] / n } else { 0.0 },
        uploaded_top_share: if n > 0.0 { sent[k - 1] / n } else { 0.0 },
        replaced,
    }
}

/// The feeder an audit simulates: the utility's recovered profiles (meters ×
/// intervals), the profile and the window; and, where the service has them,
/// the captured meters' own uploads (rows in the order of the captured set).
#[derive(Clone, Copy)]
pub struct Feeder<'a> {
    pub base: &'a DMatrix<f64>,
    pub profile: &'a DitherProfile,
    pub layout: DayLayout,
    pub uploads: Option<&'a LevelMatrix>,
}

/// One bootstrap draw: the habit (base, clipped, checked), the truth with
/// events, the levels of every meter, and which rows carry events.
pub struct Draw {
    pub habit: DMatrix<f64>,
    pub truth: DMatrix<f64>,
    pub levels: LevelMatrix,
    /// Events on the captured meters and the curve's other meters.
    pub events: Vec<InjectedEvent>,
    /// The captured meters, then the curve's other meters.
    pub curve_rows: Vec<usize>,
    /// Meters whose events tune thresholds (none of the curve's).
    pub tuning_rows: Vec<usize>,
    pub tuning_events: Vec<InjectedEvent>,
    pub base_checks: Vec<BaseCheck>,
}

fn check_captured(captured: &[usize], m: usize) -> Result<(), FieldError> {
    if captured.is_empty() {
        return Err(FieldError::new("captured", "name at least one captured meter"));
    }
    if let Some(bad) = captured.iter().find(|&&i| i >= m) {
        return Err(FieldError::new("captured", format!("row {bad} is outside the feeder's {m} meters")));
    }
    let mut uniq = captured.to_vec();
    uniq.sort_unstable();
    uniq.dedup();
    if uniq.len() != captured.len() {
        return Err(FieldError::new("captured", "a meter is named twice"));
    }
    Ok(())
}

/// `want` rows spread over `pool`.
fn spread(pool: &[usize], want: usize) -> Vec<usize> {
    if want == 0 || pool.is_empty() {
        return Vec::new();
    }
    let stride = (pool.len() as f64 / want as f64).max(1.0);
    let mut v: Vec<usize> = (0..want).map(|e| pool[((e as f64 * stride) as usize).min(pool.len() - 1)]).collect();
    v.dedup();
    v
}

/// Draws the bootstrap's simulated feeder. Deterministic in `cfg.seed`, so
/// that a test can rerun any attacker on exactly the audit's draw.
pub fn simulate(feeder: &Feeder<'_>, captured: &[usize], cfg: &AuditConfig) -> Result<Draw, FieldError> {
    use rand::SeedableRng;
    let (base, profile, layout) = (feeder.base, feeder.profile, feeder.layout);
    let (m, n) = base.shape();
    cfg.check()?;
    check_captured(captured, m)?;
    if whole_days(layout, n).len() < 2 {
        return Err(FieldError::new("window", "the audit needs at least two whole days"));
    }
    if let Some(u) = feeder.uploads.filter(|u| u.rows() != captured.len() || u.cols() != n) {
        return Err(FieldError::new(
            "uploads",
            format!("hold {} × {}, not the {} captured meters × {n} intervals", u.rows(), u.cols(), captured.len()),
        ));
    }
    // Meters of the captured-count curve: the captured set first, then others
    // spread over the feeder, up to the largest count asked for.
    let want = cfg.curve_captured.iter().copied().filter(|c| (1..=m).contains(c)).max().unwrap_or(0);
    let mut curve_rows = captured.to_vec();
    let others: Vec<usize> = (0..m).filter(|i| !captured.contains(i)).collect();
    curve_rows.extend(spread(&others, want.saturating_sub(captured.len())));
    let free: Vec<usize> = others.iter().copied().filter(|i| !curve_rows.contains(i)).collect();
    let tuning_rows = spread(&free, cfg.tuning_meters);
    let mut habit = base.map(|v| v.clamp(0.0, cfg.alpha_kw));
    let mut base_checks = Vec::new();
    if let Some(u) = feeder.uploads {
        for (p, &i) in captured.iter().enumerate() {
            let row: Vec<f64> = habit.row(i).iter().copied().collect();
            let c = check_base(&row, u, p, profile);
            if c.replaced {
                let per_day = layout.per_day();
                let phase = layout.phase() % per_day;
                let slots = event_posterior::slot_habit(u, p, profile, layout, cfg.alpha_kw);
                for j in 0..n {
                    habit[(i, j)] = slots[(j + phase) % per_day];
                }
            }
            base_checks.push(c);
        }
    }
    // Separate streams, so that the captured meters' events and levels do not
    // depend on how many other meters the feeder has or which tune thresholds.
    let mut event_rng = rand_chacha::ChaCha8Rng::seed_from_u64(cfg.seed);
    let mut dither_rng = rand_chacha::ChaCha8Rng::seed_from_u64(cfg.seed ^ 0x9e37_79b9_7f4a_7c15);
    let mut tuning_rng = rand_chacha::ChaCha8Rng::seed_from_u64(cfg.seed ^ 0x5851_f42d_4c95_7f2d);
    let mut truth = habit.clone();
    let events = inject_events(&mut truth, &curve_rows, layout, &cfg.events, cfg.alpha_kw, &mut event_rng);
    let tuning_events = inject_events(&mut truth, &tuning_rows, layout, &cfg.events, cfg.alpha_kw, &mut tuning_rng);
    let levels = redraw_levels(&truth, profile, &mut dither_rng);
    Ok(Draw { habit, truth, levels, events, curve_rows, tuning_rows, tuning_events, base_checks })
}

/// What the curves need of a draw and the utility's recovery of it.
struct Simulated<'a> {
    draw: &'a Draw,
    utility: &'a DMatrix<f64>,
    profile: &'a DitherProfile,
    attacker: Attacker<'a>,
    tz: crate::Tz,
}

fn curve_point(
    sim: &Simulated<'_>,
    rows: &[usize],
    cols: std::ops::Range<usize>,
    layout: DayLayout,
) -> Result<CurvePoint, FieldError> {
    let Simulated { draw, utility, profile, attacker, .. } = sim;
    let lc = select_rows(&draw.levels, rows, cols.clone());
    let xc = figures_on(&draw.truth, rows, cols.clone());
    let uc = figures_on(utility, rows, cols.clone());
    let ev = events_on(&draw.events, rows, cols.clone());
    let cons = register_sums(&xc, &(0..rows.len()).collect::<Vec<_>>(), layout, profile, sim.tz);
    let recs = attack(&lc, profile, &cons, layout, attacker)?;
    let figs = score(&recs, &xc, None, Some(&ev), attacker.mix, layout);
    let st = strongest(&figs);
    Ok(CurvePoint {
        captured: rows.len(),
        days: cols.len() / layout.per_day(),
        strongest_nrmse: st.nrmse,
        strongest_event_f1: st.event_f1.unwrap_or(0.0),
        strongest_event_strategy: st.strategy,
        utility_nrmse: nrmse(&uc, &xc),
        utility_event_f1: best_f1(&uc, &ev, layout),
    })
}

fn best_f1(x: &DMatrix<f64>, events: &[InjectedEvent], layout: DayLayout) -> f64 {
    let c = score_all_thresholds(x, events, layout);
    c[best_index(&c)].f1()
}

/// Each strategy's best threshold position on the tuning meters' events.
fn tuned_thresholds(
    draw: &Draw,
    profile: &DitherProfile,
    layout: DayLayout,
    tz: crate::Tz,
    who: &Attacker<'_>,
) -> Result<Vec<(&'static str, usize)>, FieldError> {
    if draw.tuning_rows.is_empty() || draw.tuning_events.is_empty() {
        return Ok(Vec::new());
    }
    let n = draw.levels.cols();
    let rows = &draw.tuning_rows;
    let lt = select_rows(&draw.levels, rows, 0..n);
    let xt = figures_on(&draw.truth, rows, 0..n);
    let ev = events_on(&draw.tuning_events, rows, 0..n);
    let cons = register_sums(&xt, &(0..rows.len()).collect::<Vec<_>>(), layout, profile, tz);
    Ok(attack(&lt, profile, &cons, layout, who)?
        .iter()
        .map(|r| (r.strategy, best_index(&score_detector(&r.x, &r.detector, &ev, layout))))
        .collect())
}

/// The figures against more captured meters and against longer history.
fn curves(
    sim: &Simulated<'_>,
    captured: &[usize],
    cfg: &AuditConfig,
    layout: DayLayout,
) -> Result<(Vec<CurvePoint>, Vec<CurvePoint>), FieldError> {
    let (m, n) = sim.draw.truth.shape();
    let mut counts: Vec<usize> = cfg.curve_captured.iter().copied().filter(|c| (1..=m).contains(c)).collect();
    counts.sort_unstable();
    counts.dedup();
    let mut curve_captured = Vec::new();
    for c in counts.into_iter().filter(|c| *c <= sim.draw.curve_rows.len()) {
        curve_captured.push(curve_point(sim, &sim.draw.curve_rows[..c], 0..n, layout)?);
    }
    let days = whole_days(layout, n);
    let mut curve_days = Vec::new();
    let mut ds: Vec<usize> = cfg.curve_days.iter().copied().filter(|d| (2..=days.len()).contains(d)).collect();
    ds.sort_unstable();
    ds.dedup();
    for d in ds {
        let cols = days[0].start..days[d - 1].end;
        let lay = DayLayout {
            window_start: layout.window_start + (cols.start as i64) * i64::from(layout.interval_s),
            ..layout
        };
        curve_days.push(curve_point(sim, captured, cols, lay)?);
    }
    Ok((curve_captured, curve_days))
}

/// The parametric bootstrap: events injected into the captured meters of the
/// utility's recovered profiles (the whole feeder, meters × intervals, checked
/// against the captured meters' uploads where given), levels re-drawn for
/// every meter, the utility's recovery of the whole feeder and every attacker
/// on the captured meters alone, scored against the truth of the simulation.
pub fn bootstrap(
    feeder: &Feeder<'_>,
    captured: &[usize],
    cfg: &AuditConfig,
    progress: &mut dyn FnMut(&str, f64),
) -> Result<AuditReport, FieldError> {
    let (profile, layout) = (feeder.profile, feeder.layout);
    let (m, n) = feeder.base.shape();
    let draw = simulate(feeder, captured, cfg)?;
    progress("utility recovery of the whole feeder", 0.05);
    let all: Vec<usize> = (0..m).collect();
    let cons = register_sums(&draw.truth, &all, layout, profile, cfg.tz);
    let up = RecoveryParams { rank: cfg.utility_rank.clone(), alpha_kw: cfg.alpha_kw, ..Default::default() }.check()?;
    let util = recover(&draw.levels, profile, &cons, layout, &up, &mut |_, _| {})?;
    progress("attackers on the captured meters", 0.4);
    let who = Attacker { mix: &cfg.events, strategies: &cfg.strategies, alpha: cfg.alpha_kw };
    let full = 0..n;
    let lc = select_rows(&draw.levels, captured, full.clone());
    let xc = figures_on(&draw.truth, captured, full.clone());
    let uc = figures_on(&util.x, captured, full.clone());
    let ev = events_on(&draw.events, captured, full.clone());
    let ccons = register_sums(&xc, &(0..captured.len()).collect::<Vec<_>>(), layout, profile, cfg.tz);
    let recs = attack(&lc, profile, &ccons, layout, &who)?;
    let hc = figures_on(&draw.habit, captured, full.clone());
    let mut strategies = score(&recs, &xc, Some(&hc), Some(&ev), &cfg.events, layout);
    progress("thresholds tuned on other households", 0.55);
    for (name, at) in tuned_thresholds(&draw, profile, layout, cfg.tz, &who)? {
        let Some(e) = strategies.iter_mut().find(|s| s.strategy == name).and_then(|s| s.events.as_mut()) else {
            continue;
        };
        let grid = recs.iter().find(|r| r.strategy == name).map_or(&THRESHOLDS_KW[..], |r| r.detector.grid());
        e.f1_tuned_elsewhere = e.counts_by_threshold.get(at).map(EventCounts::f1);
        e.threshold_tuned_elsewhere = grid.get(at).copied();
    }
    let st = strongest(&strategies);
    let uf = event_figures(score_all_thresholds(&uc, &ev, layout), &Detector::AboveTypicalDay, &cfg.events);
    let utility = UtilityFigures {
        nrmse: nrmse(&uc, &xc),
        habit_nrmse: Some(nrmse(&uc, &hc)),
        daily_energy_error: median_daily_energy_error(&uc, &xc, layout),
        event_f1: Some(uf.f1),
        event_f1_at_documented_threshold: uf.f1_at_documented_threshold,
        population: m,
        rank: util.diagnostics.rank,
    };
    progress("curves", 0.7);
    let sim = Simulated { draw: &draw, utility: &util.x, profile, attacker: who, tz: cfg.tz };
    let (curve_captured, curve_days) = curves(&sim, captured, cfg, layout)?;
    let days = whole_days(layout, n);
    progress("mechanism figures", 0.95);
    let mechanism = mechanism_figures(profile, feeder.base.as_slice(), cfg.alpha_kw);
    Ok(AuditReport {
        mode: "bootstrap".into(),
        captured_meters: captured.len(),
        population: m,
        days: days.len(),
        interval_s: layout.interval_s,
        profile: profile.to_spec(),
        events_injected: ev.len(),
        event_mix: cfg.events.clone(),
        strategies,
        strongest: st,
        utility,
        mechanism,
        curve_captured,
        curve_days,
        base_checks: draw.base_checks,
        tuning_meters: draw.tuning_rows.len(),
        direct: None,
        assumptions: assumptions(profile),
        caution: CAUTION.into(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_bad_audit_setting_is_named() {
        let d = AuditConfig::default;
        let bad_event = |f: fn(&mut EventKind)| {
            let mut c = d();
            f(&mut c.events[0]);
            c
        };
        let cases = [
            (AuditConfig { alpha_kw: 0.0, ..d() }, "alpha_kw"),
            (AuditConfig { alpha_kw: f64::NAN, ..d() }, "alpha_kw"),
            (AuditConfig { events: vec![], ..d() }, "events"),
            (bad_event(|e| e.kw = -1.0), "events[0]"),
            (bad_event(|e| e.minutes = 0), "events[0]"),
            (bad_event(|e| e.latest_h = 25.0), "events[0]"),
            (bad_event(|e| e.daily_probability = 1.5), "events[0]"),
            (AuditConfig { strategies: vec![], ..d() }, "strategies"),
            (AuditConfig { curve_captured: vec![1; 21], ..d() }, "curve_captured"),
            (AuditConfig { curve_days: vec![7; 21], ..d() }, "curve_days"),
            (AuditConfig { tuning_meters: 50, ..d() }, "tuning_meters"),
        ];
        for (c, field) in cases {
            assert_eq!(c.check().unwrap_err().field, field);
        }
        assert!(d().check().is_ok());
    }
}
