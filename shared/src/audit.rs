//! Privacy audit: what an eavesdropper holding the uploads of a set of captured
//! meters could reconstruct, measured against every attacker strategy we know,
//! beside what the utility itself recovers from the whole feeder.
//!
//! The attacker knows the mechanism, the profile and the documented event mix,
//! not the dither values. It may run, on the captured levels only
//! ([`Strategy`]):
//! - `posterior_mean`: each reading's conditional mean under a flat prior fitted
//!   to the meter's own level counts;
//! - `top_level_runs`: runs of consecutive top-level readings ([`level_runs`]);
//! - `event_posterior`: the Bayesian event-posterior attacker
//!   ([`event_posterior`]), which reads each event's whole duration and flags
//!   intervals by their posterior probability of lying in an event;
//! - `template_glr`: the generalised likelihood-ratio test over the mix's event
//!   templates, the best placement per day and kind ([`event_posterior::template_glr`]);
//! - `captured_low_rank`: the quantized low-rank recovery over the captured meters;
//! - `day_folding`: each meter's history folded to days × intervals (low rank
//!   because households repeat their days) and recovered with the same likelihood;
//! - `joint_day_folding` (two or more meters): all captured meters' days stacked;
//! - `folded_with_readings`: the best folding as the baseline, replaced by the
//!   posterior mean wherever that rises 0.5 kW or more above it (habits from the
//!   history, excursions from the readings).
//!
//! Each strategy flags intervals with its own detector and threshold grid
//! ([`scoring`]): load above the meter's typical day for the reconstructions,
//! the event probability, the likelihood ratio or the run length for the
//! others. The audit reports each strategy's best threshold (an attacker who
//! knows the mechanism tunes it by simulation) and, as a second figure, the F1
//! at the threshold that was best on other simulated households of the feeder.
//! A strategy that was never the strongest on any figure was dropped (the
//! band-midpoint reconstruction: `tests/audit_attackers.rs` found it dominated).

use nalgebra::DMatrix;
use rand::Rng;
use serde::{Deserialize, Serialize};

use crate::error::FieldError;
use crate::mechanism::level_of;
use crate::profile::DitherProfile;
use crate::recovery::outage::DayLayout;
use crate::recovery::solver::{conditional_means, level_counts};
use crate::recovery::table::LikelihoodTable;
use crate::recovery::{recover, LevelMatrix, RankChoice, RecoveryParams, SumConstraint};

pub mod bootstrap;
pub mod event_posterior;
pub mod level_runs;
pub mod mechanism_figures;
pub mod scoring;

pub use bootstrap::*;
pub use mechanism_figures::*;

pub use scoring::{
    best_index, event_figures, kinds_in_words, median_daily_energy_error, nrmse, score_all_thresholds, score_detector,
    score_events, strongest, typical_day, Detector, EventCounts, EventFigures, KindCounts, KindFigures,
    StrategyFigures, Strongest, DOCUMENTED_THRESHOLD_KW, HIDDEN_F1, REVEALS_F1, THRESHOLDS_KW,
};

/// One kind of appliance event injected in the parametric bootstrap.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct EventKind {
    pub name: String,
    pub kw: f64,
    pub minutes: u32,
    /// Earliest and latest start, hours after the day's midnight (UTC days of the window).
    pub earliest_h: f64,
    pub latest_h: f64,
    /// Probability that a meter-day has one such event.
    pub daily_probability: f64,
}

/// The documented mix: a kettle or oven (2 kW, 15 minutes, 06-22 h), a washer or
/// dryer (3 kW, 45 minutes, 08-21 h) and car charging (7 kW, 3 hours, starting
/// 17-23 h). Sizes are common practice for household appliances, from memory.
pub fn standard_event_mix() -> Vec<EventKind> {
    let k = |name: &str, kw, minutes, earliest_h, latest_h, daily_probability| EventKind {
        name: name.into(),
        kw,
        minutes,
        earliest_h,
        latest_h,
        daily_probability,
    };
    vec![
        k("kettle or oven", 2.0, 15, 6.0, 22.0, 0.4),
        k("washer or dryer", 3.0, 45, 8.0, 21.0, 0.3),
        k("car charging", 7.0, 180, 17.0, 23.0, 0.15),
    ]
}

/// An injected event: `row` of the matrix it was added to, columns `start..start+len`.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq)]
pub struct InjectedEvent {
    pub row: usize,
    pub start: usize,
    pub len: usize,
    pub kw: f64,
    pub kind: usize,
}

/// Column ranges of the window's whole UTC days.
pub fn whole_days(layout: DayLayout, n: usize) -> Vec<std::ops::Range<usize>> {
    let per_day = layout.per_day();
    let first = (per_day - layout.phase() % per_day) % per_day;
    (0..).map(|d| first + d * per_day).take_while(|s| s + per_day <= n).map(|s| s..s + per_day).collect()
}

/// Adds events of `mix` to the given rows of `x` (kW), clipped to `alpha`.
pub fn inject_events(
    x: &mut DMatrix<f64>,
    rows: &[usize],
    layout: DayLayout,
    mix: &[EventKind],
    alpha: f64,
    rng: &mut impl Rng,
) -> Vec<InjectedEvent> {
    let per_hour = 3600.0 / f64::from(layout.interval_s);
    let mut out = Vec::new();
    let days = whole_days(layout, x.ncols());
    for &row in rows {
        for day in &days {
            for (kind, e) in mix.iter().enumerate() {
                if !rng.random_bool(e.daily_probability.clamp(0.0, 1.0)) {
                    continue;
                }
                let len = ((f64::from(e.minutes) / 60.0 * per_hour).round() as usize).max(1);
                let lo = (e.earliest_h * per_hour) as usize;
                let hi = ((e.latest_h * per_hour) as usize).max(lo + 1);
                let start = day.start + rng.random_range(lo..hi);
                if start + len > x.ncols() {
                    continue;
                }
                for j in start..start + len {
                    x[(row, j)] = (x[(row, j)] + e.kw).min(alpha);
                }
                out.push(InjectedEvent { row, start, len, kw: e.kw, kind });
            }
        }
    }
    out
}

/// An attacker strategy of the audit.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Strategy {
    PosteriorMean,
    EventPosterior,
    TemplateGlr,
    TopLevelRuns,
    CapturedLowRank,
    DayFolding,
    JointDayFolding,
    FoldedWithReadings,
}

impl Strategy {
    pub const ALL: [Strategy; 8] = [
        Strategy::PosteriorMean,
        Strategy::EventPosterior,
        Strategy::TemplateGlr,
        Strategy::TopLevelRuns,
        Strategy::CapturedLowRank,
        Strategy::DayFolding,
        Strategy::JointDayFolding,
        Strategy::FoldedWithReadings,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Strategy::PosteriorMean => "posterior_mean",
            Strategy::EventPosterior => "event_posterior",
            Strategy::TemplateGlr => "template_glr",
            Strategy::TopLevelRuns => "top_level_runs",
            Strategy::CapturedLowRank => "captured_low_rank",
            Strategy::DayFolding => "day_folding",
            Strategy::JointDayFolding => "joint_day_folding",
            Strategy::FoldedWithReadings => "folded_with_readings",
        }
    }
}

/// What the attacker knows and which strategies it runs.
#[derive(Debug, Clone, Copy)]
pub struct Attacker<'a> {
    /// The documented event mix (the event-aware strategies' templates).
    pub mix: &'a [EventKind],
    pub strategies: &'a [Strategy],
    pub alpha: f64,
}

/// A reconstruction by one attacker strategy, and how it flags events.
pub struct Reconstruction {
    pub strategy: &'static str,
    pub x: DMatrix<f64>,
    pub detector: Detector,
}

/// Grid of the event posterior's detector: the probability that an interval lies in an event.
pub const PROBABILITY_GRID: [f64; 10] = [0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9];
/// Grid of the template detector: the best placement's log-likelihood ratio (nats).
pub const LLR_GRID: [f64; 10] = [0.0, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0];

fn attacker_params(rank: RankChoice, alpha: f64) -> Result<crate::recovery::ValidRecoveryParams, FieldError> {
    // The attacker keeps every reading: excluding implausible ones would throw
    // away exactly the events it looks for.
    RecoveryParams { rank, alpha_kw: alpha, max_corrupt_fraction: 0.0, max_iterations: 200, ..Default::default() }
        .check()
}

fn rank_grid(limit: usize, grid: &[usize]) -> RankChoice {
    let g: Vec<usize> = grid.iter().copied().filter(|r| *r <= limit.max(1)).collect();
    if g.len() <= 1 {
        RankChoice::Fixed(g.first().copied().unwrap_or(1))
    } else {
        RankChoice::Auto(g)
    }
}

/// Folds each row's columns into days × per_day (padding partial days with
/// missing readings); rows of the result are (row, day) in row-major order.
fn fold(levels: &LevelMatrix, rows: &[usize], layout: DayLayout) -> (LevelMatrix, usize) {
    let per_day = layout.per_day();
    let phase = layout.phase() % per_day;
    let n = levels.cols();
    let days = (phase + n).div_ceil(per_day);
    let mut f = LevelMatrix::missing(rows.len() * days, per_day);
    for (r, &i) in rows.iter().enumerate() {
        for j in 0..n {
            let (d, s) = ((j + phase) / per_day, (j + phase) % per_day);
            f.set(r * days + d, s, levels.get(i, j));
        }
    }
    (f, days)
}

fn unfold(x: &DMatrix<f64>, rows: usize, days: usize, n: usize, layout: DayLayout) -> DMatrix<f64> {
    let per_day = layout.per_day();
    let phase = layout.phase() % per_day;
    DMatrix::from_fn(rows, n, |r, j| x[(r * days + (j + phase) / per_day, (j + phase) % per_day)])
}

fn fold_constraints(constraints: &[SumConstraint], days: usize, layout: DayLayout) -> Vec<SumConstraint> {
    let per_day = layout.per_day();
    let phase = layout.phase() % per_day;
    constraints
        .iter()
        .filter_map(|c| {
            let (d0, s0) = ((c.cols.start + phase) / per_day, (c.cols.start + phase) % per_day);
            let d1 = (c.cols.end - 1 + phase) / per_day;
            (d0 == d1).then(|| SumConstraint { row: c.row * days + d0, cols: s0..s0 + c.cols.len(), sum_kw: c.sum_kw })
        })
        .collect()
}

/// Runs the attacker's strategies on the captured meters' levels (`levels`
/// holds only them; `constraints` are their register days, which an
/// eavesdropper captures too when the profile sends them).
pub fn attack(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    layout: DayLayout,
    who: &Attacker<'_>,
) -> Result<Vec<Reconstruction>, FieldError> {
    let (k, n) = (levels.rows(), levels.cols());
    if k == 0 || n == 0 {
        return Err(FieldError::new("captured", "no captured meter with readings"));
    }
    let wants = |s: Strategy| who.strategies.contains(&s);
    let (alpha, mix) = (who.alpha, who.mix);
    let pm = posterior_means(levels, profile, alpha)?;
    let b = profile.boundaries_kw();
    let mut out = Vec::new();
    let mut push = |strategy: Strategy, x: DMatrix<f64>, detector: Detector| {
        if wants(strategy) {
            out.push(Reconstruction { strategy: strategy.as_str(), x, detector });
        }
    };
    push(Strategy::PosteriorMean, pm.clone(), Detector::AboveTypicalDay);
    if wants(Strategy::TopLevelRuns) {
        let top = u8::try_from(b.len()).unwrap_or(u8::MAX);
        let stat = level_runs::top_level_runs(levels, top);
        push(
            Strategy::TopLevelRuns,
            level_midpoints(levels, profile, alpha, &pm),
            Detector::Statistic { stat, grid: &level_runs::RUN_GRID, unit: "consecutive top-level readings" },
        );
    }
    if wants(Strategy::EventPosterior) || wants(Strategy::TemplateGlr) {
        // One habit and one pass over each event kind's starts serve both.
        let w = event_posterior::whole_event(levels, profile, layout, mix, alpha);
        let det = Detector::Statistic { stat: w.probability, grid: &PROBABILITY_GRID, unit: "probability of an event" };
        push(Strategy::EventPosterior, w.posterior_load, det);
        let det = Detector::Statistic { stat: w.glr, grid: &LLR_GRID, unit: "log-likelihood ratio (nats)" };
        push(Strategy::TemplateGlr, w.glr_load, det);
    }
    let quiet = &mut |_: &str, _: f64| {};
    if wants(Strategy::CapturedLowRank) {
        let grid = rank_grid(k, &[1, 2, 3, 5, 10]);
        let lr = recover(levels, profile, constraints, layout, &attacker_params(grid, alpha)?, quiet)?;
        push(Strategy::CapturedLowRank, lr.x, Detector::AboveTypicalDay);
    }
    let folds_alone = wants(Strategy::DayFolding) || (k < 2 && wants(Strategy::FoldedWithReadings));
    let folds_jointly = k >= 2 && (wants(Strategy::JointDayFolding) || wants(Strategy::FoldedWithReadings));
    let flayout = DayLayout { window_start: 0, interval_s: layout.interval_s };
    let mut baseline = None;
    if folds_alone {
        let folded = own_days_folded(levels, profile, constraints, layout, alpha)?;
        baseline = Some(folded.clone());
        push(Strategy::DayFolding, folded, Detector::AboveTypicalDay);
    }
    if folds_jointly {
        let rows: Vec<usize> = (0..k).collect();
        let (f, days) = fold(levels, &rows, layout);
        let fc = fold_constraints(constraints, days, layout);
        let grid = rank_grid(k * days, &[1, 2, 3, 5, 10, 20]);
        let r = recover(&f, profile, &fc, flayout, &attacker_params(grid, alpha)?, quiet)?;
        let joint = unfold(&r.x, k, days, n, layout);
        baseline = Some(joint.clone());
        push(Strategy::JointDayFolding, joint, Detector::AboveTypicalDay);
    }
    if let Some(base) = baseline.filter(|_| wants(Strategy::FoldedWithReadings)) {
        // Habits from the history, excursions from the readings.
        let combined =
            DMatrix::from_fn(k, n, |i, j| if pm[(i, j)] - base[(i, j)] >= 0.5 { pm[(i, j)] } else { base[(i, j)] });
        push(Strategy::FoldedWithReadings, combined, Detector::AboveTypicalDay);
    }
    Ok(out)
}

/// Per-reading posterior means, each meter with its own fitted prior; a
/// missing reading takes the mean of the meter's others.
fn posterior_means(levels: &LevelMatrix, profile: &DitherProfile, alpha: f64) -> Result<DMatrix<f64>, FieldError> {
    let (k, n) = (levels.rows(), levels.cols());
    let table = LikelihoodTable::for_fit(profile, alpha)?;
    let mut pm = DMatrix::zeros(k, n);
    for i in 0..k {
        let mut row = LevelMatrix::missing(1, n);
        for j in 0..n {
            row.set(0, j, levels.get(i, j));
        }
        let cm = conditional_means(&table, alpha, &level_counts(&row, profile.levels()));
        let observed: Vec<f64> = (0..n).filter_map(|j| levels.get(i, j).map(|l| cm[usize::from(l)])).collect();
        let fill = if observed.is_empty() { 0.0 } else { observed.iter().sum::<f64>() / observed.len() as f64 };
        for j in 0..n {
            pm[(i, j)] = levels.get(i, j).map_or(fill, |l| cm[usize::from(l)]);
        }
    }
    Ok(pm)
}

/// Each reading at the midpoint of its level's band (the outer bands reach two
/// dither scales beyond their boundary); a missing one at its posterior mean.
fn level_midpoints(levels: &LevelMatrix, profile: &DitherProfile, alpha: f64, pm: &DMatrix<f64>) -> DMatrix<f64> {
    let (b, s) = (profile.boundaries_kw(), profile.scale_kw());
    let mid = |l: u8| -> f64 {
        let l = usize::from(l);
        let lo = if l == 0 { (b[0] - 2.0 * s).max(0.0) } else { b[l - 1] };
        let hi = if l == b.len() { b[b.len() - 1] + 2.0 * s } else { b[l] };
        (0.5 * (lo + hi)).clamp(0.0, alpha)
    };
    DMatrix::from_fn(levels.rows(), levels.cols(), |i, j| levels.get(i, j).map_or(pm[(i, j)], mid))
}

/// Day folding of each meter on its own: its days as the rows of a low-rank fit.
fn own_days_folded(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    layout: DayLayout,
    alpha: f64,
) -> Result<DMatrix<f64>, FieldError> {
    let (k, n) = (levels.rows(), levels.cols());
    let flayout = DayLayout { window_start: 0, interval_s: layout.interval_s };
    let mut folded = DMatrix::zeros(k, n);
    for i in 0..k {
        let (f, days) = fold(levels, &[i], layout);
        let own: Vec<SumConstraint> = constraints
            .iter()
            .filter(|c| c.row == i)
            .map(|c| SumConstraint { row: 0, cols: c.cols.clone(), sum_kw: c.sum_kw })
            .collect();
        let fc = fold_constraints(&own, days, layout);
        let grid = rank_grid(days, &[1, 2, 3, 5]);
        let r = recover(&f, profile, &fc, flayout, &attacker_params(grid, alpha)?, &mut |_, _| {})?;
        folded.row_mut(i).copy_from(&unfold(&r.x, 1, days, n, layout).row(0));
    }
    Ok(folded)
}

/// Scores reconstructions of rows `rows` of `reference` (events' rows index `rows`' positions).
pub fn score(
    recs: &[Reconstruction],
    reference: &DMatrix<f64>,
    habit: Option<&DMatrix<f64>>,
    events: Option<&[InjectedEvent]>,
    mix: &[EventKind],
    layout: DayLayout,
) -> Vec<StrategyFigures> {
    recs.iter()
        .map(|r| StrategyFigures {
            strategy: r.strategy.to_owned(),
            nrmse: nrmse(&r.x, reference),
            habit_nrmse: habit.map(|h| nrmse(&r.x, h)),
            daily_energy_error: median_daily_energy_error(&r.x, reference, layout),
            events: events.map(|ev| event_figures(score_detector(&r.x, &r.detector, ev, layout), &r.detector, mix)),
        })
        .collect()
}

/// Quantizes `x` with the profile, drawing dither from `rng`.
pub fn redraw_levels(x: &DMatrix<f64>, profile: &DitherProfile, rng: &mut impl Rng) -> LevelMatrix {
    let mut l = LevelMatrix::missing(x.nrows(), x.ncols());
    for i in 0..x.nrows() {
        for j in 0..x.ncols() {
            l.set(i, j, Some(crate::mechanism::dither_and_quantize(profile, x[(i, j)], rng)));
        }
    }
    l
}

/// Quantizes `x` with common random numbers: `z` holds standardized dither
/// draws (scale 1), multiplied by the profile's scale.
pub fn levels_from_standard(x: &DMatrix<f64>, profile: &DitherProfile, z: &DMatrix<f64>) -> LevelMatrix {
    let s = profile.scale_kw();
    let mut l = LevelMatrix::missing(x.nrows(), x.ncols());
    for i in 0..x.nrows() {
        for j in 0..x.ncols() {
            l.set(i, j, Some(level_of(profile, x[(i, j)] + s * z[(i, j)])));
        }
    }
    l
}

/// For each of `rows` (re-indexed by position) and each column range, the exact sum of `x`.
fn sums_over(x: &DMatrix<f64>, rows: &[usize], periods: &[std::ops::Range<usize>]) -> Vec<SumConstraint> {
    rows.iter()
        .enumerate()
        .flat_map(|(r, &i)| {
            periods.iter().map(move |p| SumConstraint {
                row: r,
                cols: p.clone(),
                sum_kw: p.clone().map(|j| x[(i, j)]).sum(),
            })
        })
        .collect()
}

/// Exact register sums of rows `rows` of `x` over every whole register period
/// of the profile inside the window: what gateways send and an eavesdropper
/// captures (`tz` places weeks and months). Empty when the profile sends none.
pub fn register_sums(
    x: &DMatrix<f64>,
    rows: &[usize],
    layout: DayLayout,
    profile: &DitherProfile,
    tz: crate::Tz,
) -> Vec<SumConstraint> {
    let step = i64::from(layout.interval_s);
    let (from, to) = (layout.window_start, layout.window_start + x.ncols() as i64 * step);
    let mut periods = Vec::new();
    let mut t = from;
    while t < to {
        let Some((s, e)) = profile.register_period().bounds(tz, t) else { return Vec::new() };
        if s >= from && e <= to && (s - from) % step == 0 && (e - from) % step == 0 {
            periods.push(((s - from) / step) as usize..((e - from) / step) as usize);
        }
        t = e.max(t + step);
    }
    sums_over(x, rows, &periods)
}

/// Rows `rows` of a level matrix.
pub fn select_rows(levels: &LevelMatrix, rows: &[usize], cols: std::ops::Range<usize>) -> LevelMatrix {
    let mut out = LevelMatrix::missing(rows.len(), cols.len());
    for (r, &i) in rows.iter().enumerate() {
        for (c, j) in cols.clone().enumerate() {
            out.set(r, c, levels.get(i, j));
        }
    }
    out
}

/// The strongest event F1 with counts pooled over several bootstrap reports
/// (for example one per captured meter): per strategy and threshold the counts
/// are summed, then the best F1 is taken. Returns (strategy, F1).
pub fn pooled_event_f1(reports: &[AuditReport]) -> (String, f64) {
    let mut pooled: std::collections::BTreeMap<&str, Vec<EventCounts>> = Default::default();
    for r in reports {
        for s in &r.strategies {
            let Some(e) = &s.events else { continue };
            let slot =
                pooled.entry(&s.strategy).or_insert_with(|| vec![EventCounts::default(); e.counts_by_threshold.len()]);
            for (a, c) in slot.iter_mut().zip(&e.counts_by_threshold) {
                a.add(c);
            }
        }
    }
    pooled
        .into_iter()
        .map(|(s, c)| (s.to_owned(), c[best_index(&c)].f1()))
        .max_by(|a, b| a.1.total_cmp(&b.1))
        .unwrap_or_default()
}

/// Attackers on the stored levels of the captured meters, compared with the
/// utility's recovery of them (`utility`: the captured rows, in order).
pub fn direct(
    captured_levels: &LevelMatrix,
    utility: &DMatrix<f64>,
    constraints: &[SumConstraint],
    profile: &DitherProfile,
    layout: DayLayout,
    alpha: f64,
) -> Result<DirectFigures, FieldError> {
    let mix = standard_event_mix();
    let who = Attacker { mix: &mix, strategies: &Strategy::ALL, alpha };
    let recs = attack(captured_levels, profile, constraints, layout, &who)?;
    let strategies = score(&recs, utility, None, None, &mix, layout);
    let strongest = strongest(&strategies);
    Ok(DirectFigures {
        strategies,
        strongest,
        note: "Direct mode compares each attacker with the utility's own recovery of the same meters, not with the \
               truth, and scores no events: the stored data hold no known events."
            .into(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn profile(scale: f64, b: &[f64]) -> DitherProfile {
        crate::profile::test_profile("gaussian", scale, b)
    }

    #[test]
    fn events_land_in_their_windows_and_fold_round_trips() {
        let layout = DayLayout { window_start: 86_400 * 10 + 900 * 5, interval_s: 900 };
        let mut x = DMatrix::zeros(2, 96 * 7);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
        let ev = inject_events(&mut x, &[0, 1], layout, &standard_event_mix(), 15.0, &mut rng);
        assert!(!ev.is_empty());
        for e in &ev {
            let slot = (e.start + layout.phase()) % 96;
            let mix = &standard_event_mix()[e.kind];
            assert!(slot as f64 >= mix.earliest_h * 4.0 && (slot as f64) < mix.latest_h * 4.0);
        }
        let mut l = LevelMatrix::missing(2, 96 * 7);
        for j in 0..96 * 7 {
            l.set(0, j, Some((j % 3) as u8));
            l.set(1, j, Some((j % 2) as u8));
        }
        let (f, days) = fold(&l, &[0, 1], layout);
        assert_eq!(days, 8);
        let back = DMatrix::from_fn(f.rows(), f.cols(), |i, j| f.get(i, j).map_or(-1.0, f64::from));
        let un = unfold(&back, 2, days, 96 * 7, layout);
        for j in 0..96 * 7 {
            assert_eq!(un[(0, j)], (j % 3) as f64);
            assert_eq!(un[(1, j)], (j % 2) as f64);
        }
    }

    #[test]
    fn mechanism_figures_behave_at_their_limits() {
        let weak = profile(0.1, &[0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0]);
        let strong = profile(1.0, &[1.0, 2.0]);
        let sample: Vec<f64> = (0..400).map(|i| i as f64 * 0.01).collect();
        let (a, b) = (mutual_information_bits(&weak, &sample), mutual_information_bits(&strong, &sample));
        assert!(a > b && b > 0.0 && a <= 3.0, "{a} {b}");
        let (ea, eb) = (ldp_epsilon(&weak, 0.0, 4.0), ldp_epsilon(&strong, 0.0, 4.0));
        assert!(ea > eb && eb.is_finite() && eb > 0.0, "{ea} {eb}");
    }
}
