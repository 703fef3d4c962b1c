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
use crate::mechanism::{level_of, log_likelihood};
use crate::profile::DitherProfile;
use crate::recovery::outage::DayLayout;
use crate::recovery::solver::{conditional_means, level_counts};
use crate::recovery::table::LikelihoodTable;
use crate::recovery::{recover, LevelMatrix, RankChoice, RecoveryParams, SumConstraint};

pub mod event_posterior;
pub mod level_runs;
pub mod scoring;

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
    let s = profile.scale_kw();
    let table = LikelihoodTable::new(profile, -0.5 * alpha - 5.0 * s, 1.5 * alpha + 5.0 * s);
    // Per-reading strategies, each meter with its own fitted prior.
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
    let b = profile.boundaries_kw();
    let mid = |l: u8| -> f64 {
        let l = usize::from(l);
        let lo = if l == 0 { (b[0] - 2.0 * s).max(0.0) } else { b[l - 1] };
        let hi = if l == b.len() { b[b.len() - 1] + 2.0 * s } else { b[l] };
        (0.5 * (lo + hi)).clamp(0.0, alpha)
    };
    let midpoint = DMatrix::from_fn(k, n, |i, j| levels.get(i, j).map_or(pm[(i, j)], mid));
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
            midpoint,
            Detector::Statistic { stat, grid: &level_runs::RUN_GRID, unit: "consecutive top-level readings" },
        );
    }
    if wants(Strategy::EventPosterior) {
        let (prob, load) = event_posterior::posterior_events(levels, profile, layout, mix, alpha);
        let det = Detector::Statistic { stat: prob, grid: &PROBABILITY_GRID, unit: "probability of an event" };
        push(Strategy::EventPosterior, load, det);
    }
    if wants(Strategy::TemplateGlr) {
        let (stat, load) = event_posterior::template_glr(levels, profile, layout, mix, alpha);
        let det = Detector::Statistic { stat, grid: &LLR_GRID, unit: "log-likelihood ratio (nats)" };
        push(Strategy::TemplateGlr, load, det);
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
        // Each meter's own days.
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
            let r = recover(&f, profile, &fc, flayout, &attacker_params(grid, alpha)?, quiet)?;
            folded.row_mut(i).copy_from(&unfold(&r.x, 1, days, n, layout).row(0));
        }
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

/// Mutual information (bits) between a reading and its level, for readings
/// distributed as the given sample (equal weights).
pub fn mutual_information_bits(profile: &DitherProfile, sample_kw: &[f64]) -> f64 {
    let k = profile.levels();
    if sample_kw.is_empty() {
        return 0.0;
    }
    let mut marginal = vec![0.0; k];
    let mut cond_entropy = 0.0;
    for &x in sample_kw {
        for (l, m) in marginal.iter_mut().enumerate() {
            let (lp, _) = log_likelihood(profile, l as u8, x);
            let p = lp.exp();
            *m += p;
            if p > 0.0 {
                cond_entropy -= p * lp;
            }
        }
    }
    let w = sample_kw.len() as f64;
    let h: f64 = marginal.iter().map(|m| m / w).filter(|p| *p > 0.0).map(|p| -p * p.ln()).sum();
    ((h - cond_entropy / w) / std::f64::consts::LN_2).max(0.0)
}

/// Local differential-privacy epsilon of the mechanism for readings in [lo, hi]:
/// max over levels and pairs of readings of log P(level | x) / P(level | x').
/// Finite because both noise families have full support; a bounded-support
/// dither would give infinity. Evaluated on a grid of 4001 points, refined by
/// golden-section search around each level's most likely reading.
pub fn ldp_epsilon(profile: &DitherProfile, lo: f64, hi: f64) -> f64 {
    let grid = 4000;
    let xs: Vec<f64> = (0..=grid).map(|g| lo + (hi - lo) * g as f64 / grid as f64).collect();
    (0..profile.levels() as u8)
        .map(|l| {
            let lp: Vec<f64> = xs.iter().map(|x| log_likelihood(profile, l, *x).0).collect();
            let (imax, _) =
                lp.iter().enumerate().fold((0, f64::NEG_INFINITY), |b, (i, v)| if *v > b.1 { (i, *v) } else { b });
            // Each level's probability is unimodal in x: refine its maximum.
            let (mut a, mut b) = (xs[imax.saturating_sub(1)], xs[(imax + 1).min(grid)]);
            let f = |x: f64| log_likelihood(profile, l, x).0;
            let g = 0.5 * (5f64.sqrt() - 1.0);
            for _ in 0..60 {
                let (c, d) = (b - g * (b - a), a + g * (b - a));
                if f(c) > f(d) {
                    b = d;
                } else {
                    a = c;
                }
            }
            let max = f(0.5 * (a + b)).max(lp[imax]);
            // The minimum of a unimodal function over an interval is at an end.
            let min = lp[0].min(lp[grid]);
            max - min
        })
        .fold(0.0, f64::max)
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

/// Per-reading figures of the mechanism that need no attacker model.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct MechanismFigures {
    /// I(reading; level), bits, over the feeder's reading distribution.
    pub mutual_information_bits: f64,
    /// log2 of the number of levels: what a noiseless level would carry at most.
    pub level_bits: f64,
    /// LDP epsilon over [0, alpha].
    pub ldp_epsilon: f64,
    pub ldp_range_kw: [f64; 2],
    /// LDP epsilon over [0, the feeder's 99th-percentile reading].
    pub ldp_epsilon_typical: f64,
    pub ldp_typical_range_kw: [f64; 2],
    pub note: String,
}

pub fn mechanism_figures(profile: &DitherProfile, readings_kw: &[f64], alpha: f64) -> MechanismFigures {
    let stride = (readings_kw.len() / 100_000).max(1);
    let sample: Vec<f64> = readings_kw.iter().step_by(stride).copied().collect();
    let mut sorted = sample.clone();
    sorted.sort_by(f64::total_cmp);
    let p99 = sorted.get(sorted.len().saturating_sub(1) * 99 / 100).copied().unwrap_or(alpha).max(0.1);
    MechanismFigures {
        mutual_information_bits: mutual_information_bits(profile, &sample),
        level_bits: (profile.levels() as f64).log2(),
        ldp_epsilon: ldp_epsilon(profile, 0.0, alpha),
        ldp_range_kw: [0.0, alpha],
        ldp_epsilon_typical: ldp_epsilon(profile, 0.0, p99),
        ldp_typical_range_kw: [0.0, p99],
        note: format!(
            "epsilon is finite only because {} dither has full support (a bounded dither gives infinity); \
             with epsilon this large the per-reading guarantee is weak, and what protects a household is the \
             low information per reading, not a differential-privacy bound",
            profile.noise().as_str()
        ),
    }
}

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
            alpha_kw: 15.0,
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
    let mut counts: Vec<usize> = cfg.curve_captured.iter().copied().filter(|c| (1..=m).contains(c)).collect();
    counts.sort_unstable();
    counts.dedup();
    let mut curve_captured = Vec::new();
    for c in counts.into_iter().filter(|c| *c <= draw.curve_rows.len()) {
        curve_captured.push(curve_point(&sim, &draw.curve_rows[..c], full.clone(), layout)?);
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
        curve_days.push(curve_point(&sim, captured, cols, lay)?);
    }
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
