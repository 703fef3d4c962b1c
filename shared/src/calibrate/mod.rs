//! Per-feeder dither calibration: the noise scale (and a choice among level
//! sets and register periods) that keeps the strongest attacker's event
//! detection under a bound while the aggregates the utility uses stay accurate:
//! each meter's daily energy, its energy per tariff band and billing period,
//! and the load of a group of meters per interval. A household's own interval
//! profile, which the dither exists to hide, is only an optional target.
//!
//! Every candidate is scored by one Monte Carlo simulation with common random
//! numbers: the events, the captured sets and the standardized dither draws are
//! fixed by the seed, and a candidate scale only multiplies the draws. The
//! objective is then a deterministic function of the scale, so a search over it
//! is repeatable and two runs with the same inputs agree. Per level set, a
//! geometric grid of scales brackets the smallest scale meeting the privacy
//! target, and Brent's method (argmin's `BrentRoot`) narrows the bracket.

use std::cell::RefCell;

use argmin::core::{CostFunction, Executor};
use argmin::solver::brent::BrentRoot;
use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use crate::audit::{standard_event_mix, EventKind};
use crate::error::FieldError;
use crate::profile::{DitherProfile, DitherProfileSpec, RegisterPeriod};
use crate::recovery::outage::DayLayout;
use crate::recovery::RankChoice;
use crate::tariff::TariffCalendar;

mod choose;
pub mod figures;
mod simulation;

use choose::choose;
pub use simulation::Simulation;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Targets {
    /// Bound on the strongest attacker's event F1 …
    pub event_f1_max: f64,
    /// … for an attacker holding this many meters.
    pub captured: usize,
    /// Bound on the utility's median daily-energy error (fraction).
    pub daily_energy_error_max: f64,
    /// Bound on the nRMSE of a group's load per interval (fraction), for groups
    /// of [`Targets::group_size`] meters: transformers, portfolios, classes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub group_nrmse_max: Option<f64>,
    /// The group size the group target speaks of. Default 50.
    #[serde(default = "default_group_size")]
    pub group_size: usize,
    /// Bound on the median error of each meter's energy per tariff band and
    /// billing period (fraction); needs the feeder's tariff calendar.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub band_energy_error_max: Option<f64>,
    /// Optional bound on the utility's interval nRMSE over the feeder, per
    /// meter and interval: what the dither hides, so rarely a fair target.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub profile_nrmse_max: Option<f64>,
}

fn default_group_size() -> usize {
    DEFAULT_GROUP_SIZE
}

/// The group size of the group-load target unless the operator names one.
pub const DEFAULT_GROUP_SIZE: usize = 50;

impl Targets {
    /// The daily-energy and event targets alone (no group, band or interval bound).
    pub fn new(event_f1_max: f64, captured: usize, daily_energy_error_max: f64) -> Self {
        Self {
            event_f1_max,
            captured,
            daily_energy_error_max,
            group_nrmse_max: None,
            group_size: DEFAULT_GROUP_SIZE,
            band_energy_error_max: None,
            profile_nrmse_max: None,
        }
    }
}

/// The calibration's default seed (the audit's is [`crate::audit::DEFAULT_SEED`]).
pub const DEFAULT_SEED: u64 = 5;

#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationConfig {
    pub targets: Targets,
    /// Scales searched, kW.
    pub scale_range_kw: (f64, f64),
    /// Points of the geometric grid per level set (the trade-off curve).
    pub grid: usize,
    /// Candidate boundary sets; empty: the current profile's, and 3 and 8
    /// levels at quantiles of the feeder's readings.
    pub level_sets: Vec<Vec<f64>>,
    /// Captured sets simulated (disjoint, spread over the feeder); their event
    /// counts are pooled.
    pub sets: usize,
    /// The search aims at `margin` × the F1 bound, so that a fresh simulation,
    /// whose F1 scatters around the search's, still meets the bound.
    pub margin: f64,
    pub seed: u64,
    pub alpha_kw: f64,
    pub utility_rank: RankChoice,
    pub events: Vec<EventKind>,
    /// Register periods searched with the scale and level set; empty: the
    /// current profile's only.
    pub register_periods: Vec<RegisterPeriod>,
    /// The feeder's time zone (weekly and monthly periods).
    pub tz: crate::Tz,
    /// The feeder's tariff calendar: the band-energy figure is measured on it.
    pub tariff: Option<TariffCalendar>,
}

impl CalibrationConfig {
    pub fn new(targets: Targets) -> Self {
        Self {
            targets,
            scale_range_kw: (0.05, 4.0),
            grid: 6,
            level_sets: Vec::new(),
            sets: 8,
            margin: 0.8,
            seed: DEFAULT_SEED,
            alpha_kw: crate::recovery::DEFAULT_ALPHA_KW,
            utility_rank: RankChoice::Fixed(10),
            events: standard_event_mix(),
            register_periods: Vec::new(),
            tz: crate::Tz::UTC,
            tariff: None,
        }
    }

    pub fn check(&self, population: usize) -> Result<(), FieldError> {
        let t = &self.targets;
        if self.register_periods.len() > RegisterPeriod::ALL.len() {
            return Err(FieldError::new("register_periods", "names more periods than exist"));
        }
        if !(t.event_f1_max > 0.0 && t.event_f1_max <= 1.0) {
            return Err(FieldError::new("event_f1_max", "must be in (0, 1]"));
        }
        if !(t.daily_energy_error_max > 0.0 && t.daily_energy_error_max <= 1.0) {
            return Err(FieldError::new("daily_energy_error_max", "must be a fraction in (0, 1]"));
        }
        if t.profile_nrmse_max.is_some_and(|v| !(v > 0.0 && v <= 10.0)) {
            return Err(FieldError::new("profile_nrmse_max", "must be in (0, 10]"));
        }
        if t.group_nrmse_max.is_some_and(|v| !(v > 0.0 && v <= 10.0)) {
            return Err(FieldError::new("group_nrmse_max", "must be in (0, 10]"));
        }
        if t.group_size == 0 || (t.group_nrmse_max.is_some() && t.group_size > population) {
            return Err(FieldError::new(
                "group_size",
                format!("must be between 1 and the feeder's {population} meters, is {}", t.group_size),
            ));
        }
        if t.band_energy_error_max.is_some_and(|v| !(v > 0.0 && v <= 1.0)) {
            return Err(FieldError::new("band_energy_error_max", "must be a fraction in (0, 1]"));
        }
        if t.captured == 0 || t.captured.saturating_mul(self.sets.max(1)) > population {
            return Err(FieldError::new(
                "captured",
                format!("{} captured meters × {} sets exceed the feeder's {population} meters", t.captured, self.sets),
            ));
        }
        let (lo, hi) = self.scale_range_kw;
        if !(lo > 0.0 && hi > lo && hi <= 50.0) {
            return Err(FieldError::new("scale_range_kw", "must satisfy 0 < low < high ≤ 50 kW"));
        }
        if !(2..=30).contains(&self.grid) {
            return Err(FieldError::new("grid", "must be between 2 and 30"));
        }
        if !(1..=50).contains(&self.sets) {
            return Err(FieldError::new("sets", "must be between 1 and 50"));
        }
        if !(self.margin > 0.0 && self.margin <= 1.0) {
            return Err(FieldError::new("margin", "must be in (0, 1]"));
        }
        Ok(())
    }
}

/// One evaluated candidate.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TradeoffPoint {
    pub register_period: RegisterPeriod,
    pub levels: usize,
    pub boundaries_kw: Vec<f64>,
    pub scale_kw: f64,
    /// Strongest attacker's event F1, pooled over the captured sets.
    pub attacker_event_f1: f64,
    pub attacker_strategy: String,
    pub utility_daily_energy_error: f64,
    pub utility_nrmse: f64,
    /// nRMSE of the loads of disjoint groups of the targets' group size.
    #[serde(default)]
    pub utility_group_nrmse: f64,
    /// Median error of each meter's energy per band and billing period, where
    /// a tariff calendar was given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub utility_band_energy_error: Option<f64>,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    pub meets_targets: bool,
    /// The recommendation, or when the targets cannot both be met, the closest trade-off.
    pub recommended: DitherProfileSpec,
    pub chosen: TradeoffPoint,
    pub targets: Targets,
    pub message: String,
    /// Every evaluated candidate, by level set then scale: the trade-off curves.
    pub curve: Vec<TradeoffPoint>,
    pub evaluations: usize,
    /// How each level set's search for its smallest safe scale ended.
    #[serde(default)]
    pub searches: Vec<ScaleSearch>,
}

/// One level set's search between grid scales.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ScaleSearch {
    pub register_period: RegisterPeriod,
    pub levels: usize,
    /// The grid scales that bracket the aim (kW), when some pair does.
    pub bracket_kw: Option<(f64, f64)>,
    /// Iterations of Brent's method inside the bracket.
    pub iterations: u64,
    pub stop: SearchStop,
}

/// Why a scale search ended.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SearchStop {
    /// Brent's method met its tolerance (1% of the bracket's upper scale).
    Converged,
    /// It used its iteration limit; the best grid or search point stands.
    MaxIterations,
    /// The smallest grid scale already meets the aim: nothing to narrow.
    SmallestScaleMeets,
    /// No grid scale meets the aim: nothing to narrow.
    NoScaleMeets,
    /// The search failed (the reason); the grid's feasible point stands.
    Failed(String),
}

/// Runs Brent's method on `gap` inside `[lo, hi]`, at most 10 iterations.
fn narrow(gap: Gap<'_>, lo: f64, hi: f64) -> (u64, SearchStop) {
    use argmin::core::{State, TerminationReason, TerminationStatus};
    let solver = BrentRoot::new(lo, hi, 0.01 * hi);
    match Executor::new(gap, solver).configure(|s| s.max_iters(10)).run() {
        Ok(r) => {
            let st = r.state();
            let stop = match st.get_termination_status() {
                TerminationStatus::Terminated(TerminationReason::MaxItersReached) => SearchStop::MaxIterations,
                TerminationStatus::Terminated(TerminationReason::SolverConverged) => SearchStop::Converged,
                other => SearchStop::Failed(format!("{other:?}")),
            };
            (st.get_iter(), stop)
        }
        Err(e) => (0, SearchStop::Failed(e.to_string())),
    }
}

/// Boundary sets at quantiles of the feeder's readings, rounded to 0.05 kW.
pub fn quantile_boundaries(readings: &[f64], quantiles: &[f64]) -> Vec<f64> {
    let mut v: Vec<f64> = readings.iter().copied().filter(|x| x.is_finite()).collect();
    v.sort_by(f64::total_cmp);
    let mut out: Vec<f64> = Vec::new();
    for q in quantiles {
        let x = v.get(((v.len().saturating_sub(1)) as f64 * q) as usize).copied().unwrap_or(1.0);
        let b = (((x / 0.05).round() * 5.0).round() / 100.0).max(0.05);
        if out.last().is_none_or(|l| b > *l + 1e-9) {
            out.push(b);
        }
    }
    out
}

struct Gap<'a> {
    sim: &'a Simulation,
    period: RegisterPeriod,
    boundaries: &'a [f64],
    aim: f64,
    seen: &'a RefCell<Vec<TradeoffPoint>>,
}

impl CostFunction for Gap<'_> {
    type Param = f64;
    type Output = f64;
    fn cost(&self, s: &f64) -> Result<f64, argmin::core::Error> {
        let p = self
            .sim
            .evaluate_with(self.boundaries, *s, self.period)
            .map_err(|e| argmin::core::Error::msg(e.to_string()))?;
        let gap = p.attacker_event_f1 - self.aim;
        self.seen.borrow_mut().push(p);
        Ok(gap)
    }
}

/// Recommends a profile for the feeder whose recovered profiles are `base`.
pub fn calibrate(
    base: &DMatrix<f64>,
    current: &DitherProfile,
    layout: DayLayout,
    cfg: &CalibrationConfig,
    progress: &mut dyn FnMut(&str, f64),
) -> Result<Calibration, FieldError> {
    cfg.check(base.nrows())?;
    if cfg.targets.band_energy_error_max.is_some() && cfg.tariff.is_none() {
        return Err(FieldError::new(
            "band_energy_error_max",
            "needs the feeder's tariff calendar, and none is stored or given",
        ));
    }
    let sim = Simulation::new(base, current, layout, cfg, cfg.seed);
    let sets = level_sets(base, current, cfg);
    let (lo, hi) = cfg.scale_range_kw;
    let grid: Vec<f64> = (0..cfg.grid).map(|g| lo * (hi / lo).powf(g as f64 / (cfg.grid - 1) as f64)).collect();
    let aim = cfg.margin * cfg.targets.event_f1_max;
    let mut periods = cfg.register_periods.clone();
    if periods.is_empty() {
        periods.push(current.register_period());
    }
    periods.dedup();
    let candidates: Vec<(RegisterPeriod, &Vec<f64>)> =
        periods.iter().flat_map(|p| sets.iter().map(move |b| (*p, b))).collect();
    let mut curve = Vec::new();
    let mut best_per_set: Vec<TradeoffPoint> = Vec::new();
    let mut searches = Vec::with_capacity(candidates.len());
    let total = candidates.len() as f64;
    for (si, &(period, b)) in candidates.iter().enumerate() {
        progress(
            &format!("{} register reads, level set {} of {}", period.as_str(), si % sets.len() + 1, sets.len()),
            si as f64 / total,
        );
        let (pts, search) = search_scale(&sim, period, b, &grid, aim)?;
        searches.push(search);
        // Accept a scale only when every evaluated larger scale also meets the aim:
        // Monte Carlo F1 is not monotone in the scale, and a lucky dip is no recommendation.
        if let Some(i) = (0..pts.len()).find(|&i| pts[i..].iter().all(|p| p.attacker_event_f1 <= aim)) {
            best_per_set.push(pts[i].clone());
        }
        curve.extend(pts);
    }
    progress("done", 1.0);
    let (chosen, meets, message) = choose(cfg, current, &curve, &best_per_set, aim)?;
    // Round the scale up to 0.01 kW: more dither, never less.
    let recommended = DitherProfileSpec {
        scale_kw: (chosen.scale_kw * 100.0).ceil() / 100.0,
        boundaries_kw: chosen.boundaries_kw.clone(),
        ..current.with_register_period(chosen.register_period).to_spec()
    };
    Ok(Calibration {
        meets_targets: meets,
        recommended,
        chosen,
        targets: cfg.targets.clone(),
        message,
        evaluations: curve.len(),
        searches,
        curve,
    })
}

/// The level sets searched: the operator's, or the current boundaries and two
/// sets at the population's quantiles.
fn level_sets(base: &DMatrix<f64>, current: &DitherProfile, cfg: &CalibrationConfig) -> Vec<Vec<f64>> {
    let mut sets = cfg.level_sets.clone();
    if sets.is_empty() {
        sets.push(current.boundaries_kw().to_vec());
        sets.push(quantile_boundaries(base.as_slice(), &[0.5, 0.9]));
        sets.push(quantile_boundaries(base.as_slice(), &[0.2, 0.35, 0.5, 0.65, 0.8, 0.9, 0.97]));
    }
    sets.retain(|b| !b.is_empty());
    sets.dedup();
    sets
}

/// One level set and register period over the scale grid, then Brent's method
/// between the grid scales that bracket the aim. Returns the evaluated points
/// by scale, and how the search ended.
fn search_scale(
    sim: &Simulation,
    period: RegisterPeriod,
    b: &[f64],
    grid: &[f64],
    aim: f64,
) -> Result<(Vec<TradeoffPoint>, ScaleSearch), FieldError> {
    let seen = RefCell::new(Vec::new());
    for &s in grid {
        seen.borrow_mut().push(sim.evaluate_with(b, s, period)?);
    }
    // The smallest grid scale from which the attacker's F1 stays at or under the aim.
    let first_ok = {
        let s = seen.borrow();
        (0..s.len()).find(|&g| s[g..].iter().all(|p| p.attacker_event_f1 <= aim))
    };
    let mut search = ScaleSearch {
        register_period: period,
        levels: b.len() + 1,
        bracket_kw: None,
        iterations: 0,
        stop: SearchStop::NoScaleMeets,
    };
    match first_ok {
        Some(0) => search.stop = SearchStop::SmallestScaleMeets,
        Some(g) => {
            let gap = Gap { sim, period, boundaries: b, aim, seen: &seen };
            // A failure inside the bracket leaves the grid's feasible point.
            (search.iterations, search.stop) = narrow(gap, grid[g - 1], grid[g]);
            search.bracket_kw = Some((grid[g - 1], grid[g]));
        }
        None => {}
    }
    let mut pts = seen.into_inner();
    pts.sort_by(|a, b| a.scale_kw.total_cmp(&b.scale_kw));
    pts.dedup_by(|a, b| a.scale_kw == b.scale_kw);
    Ok((pts, search))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn register_periods_are_searched_beside_scale_and_levels() {
        // 60 small households × 8 days with a morning and an evening bump.
        let layout = DayLayout { window_start: 1_672_531_200, interval_s: 900 }; // 2023-01-01, a Sunday
        let base = DMatrix::from_fn(60, 96 * 8, |i, j| {
            let h = (j % 96) as f64 / 4.0;
            let bump = |c: f64| (-(h - c) * (h - c) / 2.0).exp();
            0.2 + 0.05 * (i % 7) as f64 + bump(7.5) + 1.5 * bump(19.0)
        });
        let current = crate::profile::test_profile("gaussian", 0.3, &[1.0, 2.0]);
        let targets = Targets::new(0.9, 1, 0.5);
        let cfg = CalibrationConfig {
            grid: 2,
            sets: 2,
            level_sets: vec![vec![1.0, 2.0]],
            register_periods: vec![RegisterPeriod::None, RegisterPeriod::Daily, RegisterPeriod::Weekly],
            utility_rank: RankChoice::Fixed(3),
            ..CalibrationConfig::new(targets)
        };
        let c = calibrate(&base, &current, layout, &cfg, &mut |_, _| {}).unwrap();
        let periods: Vec<RegisterPeriod> = c.curve.iter().map(|p| p.register_period).collect();
        for p in [RegisterPeriod::None, RegisterPeriod::Daily, RegisterPeriod::Weekly] {
            assert!(periods.contains(&p), "{p:?} not searched: {periods:?}");
        }
        // Daily reads pin each day's energy: the utility's daily error vanishes there.
        let daily = c.curve.iter().filter(|p| p.register_period == RegisterPeriod::Daily);
        assert!(daily.clone().count() >= 2 && daily.clone().all(|p| p.utility_daily_energy_error < 1e-6));
        let none = c.curve.iter().find(|p| p.register_period == RegisterPeriod::None).unwrap();
        assert!(none.utility_daily_energy_error > 1e-3);
        // The recommendation carries the period it was found with.
        assert_eq!(DitherProfile::try_from(c.recommended.clone()).unwrap().register_period(), c.chosen.register_period);
    }
}
