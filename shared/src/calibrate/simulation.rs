//! The fixed random numbers of one calibration, and the scoring of one candidate.

use std::collections::BTreeMap;

use nalgebra::DMatrix;
use rand::SeedableRng;

use super::figures::{group_nrmse, groups, median_band_energy_error};
use super::{CalibrationConfig, TradeoffPoint};
use crate::audit::{
    attack, best_index, inject_events, levels_from_standard, median_daily_energy_error, nrmse, register_sums,
    score_detector, select_rows, Attacker, EventCounts, EventKind, InjectedEvent, Strategy,
};
use crate::error::FieldError;
use crate::profile::{DitherProfile, DitherProfileSpec, RegisterPeriod};
use crate::recovery::outage::DayLayout;
use crate::recovery::{recover, RankChoice, RecoveryParams};
use crate::tariff::TariffCalendar;

/// The fixed random numbers of one calibration.
pub struct Simulation {
    truth: DMatrix<f64>,
    z: DMatrix<f64>,
    sets: Vec<Vec<usize>>,
    events: Vec<Vec<InjectedEvent>>,
    /// The event mix, which the event-aware attackers know.
    mix: Vec<EventKind>,
    layout: DayLayout,
    alpha: f64,
    rank: RankChoice,
    template: DitherProfileSpec,
    tz: crate::Tz,
    /// Disjoint groups of the targets' group size, drawn from the seed.
    groups: Vec<Vec<usize>>,
    tariff: Option<TariffCalendar>,
}

impl Simulation {
    /// Draws the events (into `sets` disjoint captured sets of `captured` meters,
    /// spread evenly over the feeder) and the standardized dither, from `seed`.
    pub fn new(
        base: &DMatrix<f64>,
        current: &DitherProfile,
        layout: DayLayout,
        cfg: &CalibrationConfig,
        seed: u64,
    ) -> Self {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let (m, n) = base.shape();
        let k = cfg.targets.captured;
        let stride = (m / (k * cfg.sets).max(1)).max(1);
        let picks: Vec<usize> = (0..k * cfg.sets).map(|i| (i * stride) % m).collect();
        let sets: Vec<Vec<usize>> = picks.chunks(k).map(|c| c.to_vec()).collect();
        let mut truth = base.map(|v| v.clamp(0.0, cfg.alpha_kw));
        let mut events = Vec::new();
        for s in &sets {
            let ev = inject_events(&mut truth, s, layout, &cfg.events, cfg.alpha_kw, &mut rng);
            // Rows relative to the set.
            events.push(
                ev.into_iter()
                    .map(|e| InjectedEvent { row: s.iter().position(|&i| i == e.row).unwrap_or(0), ..e })
                    .collect(),
            );
        }
        let noise = current.noise();
        let z = DMatrix::from_fn(m, n, |_, _| crate::mechanism::standard_draw(noise, &mut rng));
        Self {
            truth,
            z,
            sets,
            events,
            mix: cfg.events.clone(),
            layout,
            alpha: cfg.alpha_kw,
            rank: cfg.utility_rank.clone(),
            template: current.to_spec(),
            tz: cfg.tz,
            // Without a group target the size may exceed the feeder: one group of all.
            groups: groups(m, cfg.targets.group_size.min(m), seed),
            tariff: cfg.tariff.clone(),
        }
    }

    pub fn profile(&self, boundaries: &[f64], scale: f64) -> Result<DitherProfile, FieldError> {
        DitherProfile::try_from(DitherProfileSpec {
            scale_kw: scale,
            boundaries_kw: boundaries.to_vec(),
            ..self.template.clone()
        })
    }

    /// Scores one candidate with the current profile's register period.
    pub fn evaluate(&self, boundaries: &[f64], scale: f64) -> Result<TradeoffPoint, FieldError> {
        let period = self.profile(boundaries, scale)?.register_period();
        self.evaluate_with(boundaries, scale, period)
    }

    /// Scores one candidate: the utility recovers the whole feeder, every
    /// attacker strategy runs on each captured set, both with the register
    /// sums of `period`.
    pub fn evaluate_with(
        &self,
        boundaries: &[f64],
        scale: f64,
        period: RegisterPeriod,
    ) -> Result<TradeoffPoint, FieldError> {
        let p = self.profile(boundaries, scale)?.with_register_period(period);
        let levels = levels_from_standard(&self.truth, &p, &self.z);
        let m = self.truth.nrows();
        let all: Vec<usize> = (0..m).collect();
        let cons = register_sums(&self.truth, &all, self.layout, &p, self.tz);
        let up = RecoveryParams { rank: self.rank.clone(), alpha_kw: self.alpha, ..Default::default() }.check()?;
        let util = recover(&levels, &p, &cons, self.layout, &up, &mut |_, _| {})?;
        // Pooled counts per strategy and threshold.
        let mut pooled: BTreeMap<&'static str, Vec<EventCounts>> = BTreeMap::new();
        for (set, ev) in self.sets.iter().zip(&self.events) {
            let lc = select_rows(&levels, set, 0..levels.cols());
            let xc = DMatrix::from_fn(set.len(), self.truth.ncols(), |r, j| self.truth[(set[r], j)]);
            let own: Vec<usize> = (0..set.len()).collect();
            let cc = register_sums(&xc, &own, self.layout, &p, self.tz);
            let who = Attacker { mix: &self.mix, strategies: &Strategy::ALL, alpha: self.alpha };
            for r in attack(&lc, &p, &cc, self.layout, &who)? {
                let counts = score_detector(&r.x, &r.detector, ev, self.layout);
                let slot = pooled.entry(r.strategy).or_insert_with(|| vec![EventCounts::default(); counts.len()]);
                for (a, c) in slot.iter_mut().zip(&counts) {
                    a.add(c);
                }
            }
        }
        let (strategy, f1) = pooled
            .into_iter()
            .map(|(s, c)| (s, c[best_index(&c)].f1()))
            .max_by(|a, b| a.1.total_cmp(&b.1))
            .unwrap_or(("none", 0.0));
        Ok(TradeoffPoint {
            register_period: period,
            levels: p.levels(),
            boundaries_kw: boundaries.to_vec(),
            scale_kw: scale,
            attacker_event_f1: f1,
            attacker_strategy: strategy.to_owned(),
            utility_daily_energy_error: median_daily_energy_error(&util.x, &self.truth, self.layout),
            utility_nrmse: nrmse(&util.x, &self.truth),
            utility_group_nrmse: group_nrmse(&util.x, &self.truth, &self.groups),
            utility_band_energy_error: self
                .tariff
                .as_ref()
                .map(|c| median_band_energy_error(&util.x, &self.truth, c, self.layout)),
        })
    }
}
