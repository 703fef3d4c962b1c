//! How the audit scores a strategy: events found, intervals flagged, per event
//! kind, at every threshold of the strategy's own detector.
//!
//! An injected event is found when at least one of its intervals is flagged
//! (recall, per event); a flagged interval is correct when it lies inside an
//! injected event of that meter (precision, per interval, so that flagging
//! everything scores the events' share of intervals, not 1). Per event kind the
//! recall counts that kind's events only; its F1 pairs that recall with the
//! detector's overall precision, since a flagged interval names no kind.

use nalgebra::DMatrix;
use serde::{Deserialize, Serialize};

use super::{whole_days, EventKind, InjectedEvent};
use crate::recovery::outage::DayLayout;

/// Events of one kind and how many of them were found.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq)]
pub struct KindCounts {
    pub events: usize,
    pub found: usize,
}

/// Counts behind an event score, so that scores pool over meters and sets.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct EventCounts {
    pub events: usize,
    pub events_found: usize,
    pub flagged_intervals: usize,
    pub flagged_in_events: usize,
    /// Per event kind (index of the mix).
    #[serde(default)]
    pub kinds: Vec<KindCounts>,
}

impl EventCounts {
    pub fn add(&mut self, o: &EventCounts) {
        self.events += o.events;
        self.events_found += o.events_found;
        self.flagged_intervals += o.flagged_intervals;
        self.flagged_in_events += o.flagged_in_events;
        if self.kinds.len() < o.kinds.len() {
            self.kinds.resize(o.kinds.len(), KindCounts::default());
        }
        for (a, b) in self.kinds.iter_mut().zip(&o.kinds) {
            a.events += b.events;
            a.found += b.found;
        }
    }
    pub fn precision(&self) -> f64 {
        if self.flagged_intervals == 0 {
            0.0
        } else {
            self.flagged_in_events as f64 / self.flagged_intervals as f64
        }
    }
    pub fn recall(&self) -> f64 {
        ratio(self.events_found, self.events)
    }
    pub fn f1(&self) -> f64 {
        f1_of(self.precision(), self.recall())
    }
}

fn ratio(a: usize, b: usize) -> f64 {
    if b == 0 {
        0.0
    } else {
        a as f64 / b as f64
    }
}

fn f1_of(p: f64, r: f64) -> f64 {
    if p + r == 0.0 {
        0.0
    } else {
        2.0 * p * r / (p + r)
    }
}

/// Thresholds (kW above the typical day) an attacker may tune over. The small
/// ones let a reconstruction that dither has flattened (a posterior mean under
/// strong dither spans a few tenths of a kW) still score.
pub const THRESHOLDS_KW: [f64; 9] = [0.1, 0.2, 0.3, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0];
/// The documented detector's threshold.
pub const DOCUMENTED_THRESHOLD_KW: f64 = 1.0;

/// How a strategy flags intervals.
#[derive(Debug, Clone, PartialEq)]
pub enum Detector {
    /// Load above the meter's typical day (the median over the window's days of
    /// the same reconstruction at that time of day) by each of [`THRESHOLDS_KW`].
    AboveTypicalDay,
    /// A statistic of the strategy's own, one value per interval, flagged where
    /// it reaches each threshold of `grid` (in `unit`).
    Statistic { stat: DMatrix<f64>, grid: &'static [f64], unit: &'static str },
}

impl Detector {
    pub fn grid(&self) -> &[f64] {
        match self {
            Detector::AboveTypicalDay => &THRESHOLDS_KW,
            Detector::Statistic { grid, .. } => grid,
        }
    }
    pub fn unit(&self) -> &'static str {
        match self {
            Detector::AboveTypicalDay => "kW above the typical day",
            Detector::Statistic { unit, .. } => unit,
        }
    }
}

/// Each row's typical day: per time of day, the median over the window's days.
pub fn typical_day(r: &DMatrix<f64>, layout: DayLayout) -> DMatrix<f64> {
    let per_day = layout.per_day();
    let phase = layout.phase();
    let mut out = DMatrix::zeros(r.nrows(), per_day);
    let mut buf = Vec::new();
    for i in 0..r.nrows() {
        for slot in 0..per_day {
            buf.clear();
            let mut j = (slot + per_day - phase % per_day) % per_day;
            while j < r.ncols() {
                buf.push(r[(i, j)]);
                j += per_day;
            }
            if !buf.is_empty() {
                buf.sort_by(f64::total_cmp);
                out[(i, slot)] = buf[buf.len() / 2];
            }
        }
    }
    out
}

/// The value each interval's flag compares with the threshold.
fn margins(x: &DMatrix<f64>, detector: &Detector, layout: DayLayout) -> DMatrix<f64> {
    match detector {
        Detector::AboveTypicalDay => {
            let typ = typical_day(x, layout);
            let (per_day, phase) = (layout.per_day(), layout.phase());
            DMatrix::from_fn(x.nrows(), x.ncols(), |i, j| x[(i, j)] - typ[(i, (j + phase) % per_day)])
        }
        Detector::Statistic { stat, .. } => stat.clone(),
    }
}

fn count_at(margin: &DMatrix<f64>, inside: &[bool], events: &[InjectedEvent], threshold: f64) -> EventCounts {
    let (m, n) = margin.shape();
    let flagged = |i: usize, j: usize| margin[(i, j)] >= threshold;
    let kinds = events.iter().map(|e| e.kind + 1).max().unwrap_or(0);
    let mut c = EventCounts { events: events.len(), kinds: vec![KindCounts::default(); kinds], ..Default::default() };
    for i in 0..m {
        for j in 0..n {
            if flagged(i, j) {
                c.flagged_intervals += 1;
                c.flagged_in_events += usize::from(inside[i * n + j]);
            }
        }
    }
    for e in events {
        let found = e.row < m && (e.start..(e.start + e.len).min(n)).any(|j| flagged(e.row, j));
        c.events_found += usize::from(found);
        c.kinds[e.kind].events += 1;
        c.kinds[e.kind].found += usize::from(found);
    }
    c
}

fn inside_events(events: &[InjectedEvent], m: usize, n: usize) -> Vec<bool> {
    let mut inside = vec![false; m * n];
    for e in events.iter().filter(|e| e.row < m) {
        for j in e.start..(e.start + e.len).min(n) {
            inside[e.row * n + j] = true;
        }
    }
    inside
}

/// Scores the typical-day detector at `threshold` (kW) on reconstruction `r`
/// against `events` (whose rows index `r`).
pub fn score_events(r: &DMatrix<f64>, events: &[InjectedEvent], layout: DayLayout, threshold: f64) -> EventCounts {
    let margin = margins(r, &Detector::AboveTypicalDay, layout);
    count_at(&margin, &inside_events(events, r.nrows(), r.ncols()), events, threshold)
}

/// Detector counts at every threshold of the detector's grid.
pub fn score_detector(
    x: &DMatrix<f64>,
    detector: &Detector,
    events: &[InjectedEvent],
    layout: DayLayout,
) -> Vec<EventCounts> {
    let margin = margins(x, detector, layout);
    let inside = inside_events(events, x.nrows(), x.ncols());
    detector.grid().iter().map(|t| count_at(&margin, &inside, events, *t)).collect()
}

/// Typical-day detector counts at every threshold of [`THRESHOLDS_KW`].
pub fn score_all_thresholds(r: &DMatrix<f64>, events: &[InjectedEvent], layout: DayLayout) -> Vec<EventCounts> {
    score_detector(r, &Detector::AboveTypicalDay, events, layout)
}

/// One event kind's figures at the chosen threshold.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct KindFigures {
    pub kind: String,
    pub events: usize,
    pub recall: f64,
    /// The kind's recall paired with the detector's overall precision.
    pub f1: f64,
}

/// Event detection of one strategy: at the best threshold of its grid (an
/// attacker who knows the mechanism tunes it by simulation), at a threshold
/// tuned on other simulated households where the audit had some, and for the
/// typical-day detector at the documented 1 kW.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct EventFigures {
    #[serde(skip_serializing_if = "Option::is_none")]
    pub f1_at_documented_threshold: Option<f64>,
    pub f1: f64,
    pub precision: f64,
    pub recall: f64,
    pub best_threshold: f64,
    pub threshold_unit: String,
    /// F1 at the threshold that was best on simulated households other than the scored ones.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub f1_tuned_elsewhere: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub threshold_tuned_elsewhere: Option<f64>,
    pub by_kind: Vec<KindFigures>,
    #[serde(skip)]
    pub counts_by_threshold: Vec<EventCounts>,
}

/// The best threshold's position in `counts` (first of equals).
pub fn best_index(counts: &[EventCounts]) -> usize {
    (0..counts.len()).fold(0, |b, i| if counts[i].f1() > counts[b].f1() { i } else { b })
}

/// Figures from counts at each threshold of `grid`; `kinds` names the mix's kinds.
pub fn event_figures(per_threshold: Vec<EventCounts>, detector: &Detector, kinds: &[EventKind]) -> EventFigures {
    let grid = detector.grid();
    let best = best_index(&per_threshold);
    let c = per_threshold.get(best).cloned().unwrap_or_default();
    let documented = matches!(detector, Detector::AboveTypicalDay)
        .then(|| grid.iter().position(|t| *t == DOCUMENTED_THRESHOLD_KW))
        .flatten();
    let by_kind = c
        .kinds
        .iter()
        .enumerate()
        .map(|(k, kc)| KindFigures {
            kind: kinds.get(k).map_or_else(|| format!("kind {k}"), |e| e.name.clone()),
            events: kc.events,
            recall: ratio(kc.found, kc.events),
            f1: f1_of(c.precision(), ratio(kc.found, kc.events)),
        })
        .collect();
    EventFigures {
        f1_at_documented_threshold: documented.and_then(|d| per_threshold.get(d)).map(EventCounts::f1),
        f1: c.f1(),
        precision: c.precision(),
        recall: c.recall(),
        best_threshold: grid.get(best).copied().unwrap_or(f64::NAN),
        threshold_unit: detector.unit().to_owned(),
        f1_tuned_elsewhere: None,
        threshold_tuned_elsewhere: None,
        by_kind,
        counts_by_threshold: per_threshold,
    }
}

/// nRMSE ‖a − b‖ / ‖b‖.
pub fn nrmse(a: &DMatrix<f64>, reference: &DMatrix<f64>) -> f64 {
    (a - reference).norm() / reference.norm().max(1e-300)
}

/// Per meter the mean over whole days of |E_a − E_ref| / E_ref; the median over meters.
pub fn median_daily_energy_error(a: &DMatrix<f64>, reference: &DMatrix<f64>, layout: DayLayout) -> f64 {
    let days = whole_days(layout, a.ncols());
    if days.is_empty() || a.nrows() == 0 {
        return f64::NAN;
    }
    let mut per: Vec<f64> = (0..a.nrows())
        .map(|i| {
            days.iter()
                .map(|d| {
                    let (e, t): (f64, f64) = d
                        .clone()
                        .map(|j| (a[(i, j)], reference[(i, j)]))
                        .fold((0.0, 0.0), |s, v| (s.0 + v.0, s.1 + v.1));
                    (e - t).abs() / t.max(1e-9)
                })
                .sum::<f64>()
                / days.len() as f64
        })
        .collect();
    per.sort_by(f64::total_cmp);
    per[per.len() / 2]
}

/// What one strategy (or the utility) recovers of the captured meters.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StrategyFigures {
    pub strategy: String,
    /// Against the simulated truth, events included.
    pub nrmse: f64,
    /// Against the habitual profile (the truth without the injected events).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub habit_nrmse: Option<f64>,
    pub daily_energy_error: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub events: Option<EventFigures>,
}

/// The strongest attacker, metric by metric (each may come from a different strategy).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Strongest {
    /// The strategy strongest on the privacy-relevant metric: event F1 in the
    /// bootstrap, nRMSE when no events are scored.
    pub strategy: String,
    pub nrmse: f64,
    pub nrmse_strategy: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub habit_nrmse: Option<f64>,
    pub daily_energy_error: f64,
    pub daily_energy_strategy: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_f1: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_precision: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_recall: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_threshold: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_threshold_unit: Option<String>,
    /// The best F1 over strategies, each at the threshold tuned on other households.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub event_f1_tuned_elsewhere: Option<f64>,
    /// Per event kind, the best F1 of any strategy.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub event_by_kind: Vec<KindFigures>,
}

pub fn strongest(figs: &[StrategyFigures]) -> Strongest {
    let by = |f: &dyn Fn(&StrategyFigures) -> f64, min: bool| -> &StrategyFigures {
        figs.iter()
            .filter(|s| f(s).is_finite())
            .min_by(|a, b| if min { f(a).total_cmp(&f(b)) } else { f(b).total_cmp(&f(a)) })
            .unwrap_or(&figs[0])
    };
    let n = by(&|s| s.nrmse, true);
    let e = by(&|s| s.daily_energy_error, true);
    let ev = figs.iter().any(|s| s.events.is_some()).then(|| by(&|s| s.events.as_ref().map_or(-1.0, |e| e.f1), false));
    let evf = ev.and_then(|s| s.events.as_ref());
    let mut by_kind: Vec<KindFigures> = Vec::new();
    for k in figs.iter().filter_map(|s| s.events.as_ref()).flat_map(|e| &e.by_kind) {
        match by_kind.iter_mut().find(|b| b.kind == k.kind) {
            Some(b) if b.f1 < k.f1 => *b = k.clone(),
            Some(_) => {}
            None => by_kind.push(k.clone()),
        }
    }
    Strongest {
        strategy: ev.map_or(n.strategy.clone(), |s| s.strategy.clone()),
        nrmse: n.nrmse,
        nrmse_strategy: n.strategy.clone(),
        habit_nrmse: figs.iter().filter_map(|s| s.habit_nrmse).min_by(f64::total_cmp),
        daily_energy_error: e.daily_energy_error,
        daily_energy_strategy: e.strategy.clone(),
        event_f1: evf.map(|e| e.f1),
        event_precision: evf.map(|e| e.precision),
        event_recall: evf.map(|e| e.recall),
        event_threshold: evf.map(|e| e.best_threshold),
        event_threshold_unit: evf.map(|e| e.threshold_unit.clone()),
        event_f1_tuned_elsewhere: figs
            .iter()
            .filter_map(|s| s.events.as_ref().and_then(|e| e.f1_tuned_elsewhere))
            .max_by(f64::total_cmp),
        event_by_kind: by_kind,
    }
}

/// F1 from which a captured meter is said to reveal an event kind, and below
/// which the kind is said to stay mostly hidden. Our own reading of the scale
/// (0.5: at least about half the events found with about half the flags right),
/// not a standard.
pub const REVEALS_F1: f64 = 0.5;
pub const HIDDEN_F1: f64 = 0.3;

/// One sentence naming the kinds a captured meter still reveals at this
/// setting and those it mostly hides, from the strongest per-kind figures.
pub fn kinds_in_words(st: &Strongest) -> String {
    let name = |k: &KindFigures| format!("{} (F1 {:.2})", k.kind, k.f1);
    let list = |v: Vec<String>| match v.len() {
        0 => String::new(),
        1 => v[0].clone(),
        _ => format!("{} and {}", v[..v.len() - 1].join(", "), v[v.len() - 1]),
    };
    let scored: Vec<&KindFigures> = st.event_by_kind.iter().filter(|k| k.events > 0).collect();
    let shown: Vec<String> = scored.iter().filter(|k| k.f1 >= REVEALS_F1).map(|k| name(k)).collect();
    let hidden: Vec<String> = scored.iter().filter(|k| k.f1 < HIDDEN_F1).map(|k| name(k)).collect();
    let between: Vec<String> =
        scored.iter().filter(|k| (HIDDEN_F1..REVEALS_F1).contains(&k.f1)).map(|k| name(k)).collect();
    let mut out = Vec::new();
    if !shown.is_empty() {
        out.push(format!("A captured meter still reveals {}.", list(shown)));
    }
    if !between.is_empty() {
        out.push(format!("It partly reveals {}.", list(between)));
    }
    if !hidden.is_empty() {
        out.push(format!("It mostly hides {}.", list(hidden)));
    }
    if out.is_empty() {
        out.push("No event kind was scored.".into());
    }
    out.join(" ")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn detector_counts_runs_and_events() {
        let layout = DayLayout { window_start: 0, interval_s: 900 };
        let mut x = DMatrix::from_element(1, 96 * 3, 0.5);
        let ev = vec![InjectedEvent { row: 0, start: 100, len: 3, kw: 2.0, kind: 1 }];
        for j in 100..103 {
            x[(0, j)] += 2.0;
        }
        x[(0, 200)] += 1.5; // a false alarm
        let c = score_events(&x, &ev, layout, 1.0);
        let kinds = vec![KindCounts::default(), KindCounts { events: 1, found: 1 }];
        assert_eq!(c, EventCounts { events: 1, events_found: 1, flagged_intervals: 4, flagged_in_events: 3, kinds });
        assert!((c.f1() - 2.0 * 0.75 / 1.75).abs() < 1e-12);
        assert_eq!(score_events(&x, &ev, layout, 2.5).f1(), 0.0);
        // Flagging everything finds every event but scores only the events' share of intervals.
        let all = score_events(&(x.clone() * 0.0), &ev, layout, -1.0);
        assert_eq!((all.recall(), all.precision()), (1.0, 3.0 / 288.0));
    }

    #[test]
    fn a_statistic_detector_scores_per_kind_on_its_own_grid() {
        let layout = DayLayout { window_start: 0, interval_s: 900 };
        let ev = vec![
            InjectedEvent { row: 0, start: 10, len: 2, kw: 2.0, kind: 0 },
            InjectedEvent { row: 0, start: 50, len: 4, kw: 3.0, kind: 1 },
        ];
        let mut stat = DMatrix::zeros(1, 96 * 2);
        stat[(0, 11)] = 0.4; // the first event, weakly
        stat[(0, 52)] = 0.9; // the second, strongly
        let det = Detector::Statistic { stat, grid: &[0.3, 0.5], unit: "probability" };
        let counts = score_detector(&DMatrix::zeros(1, 96 * 2), &det, &ev, layout);
        assert_eq!((counts[0].events_found, counts[1].events_found), (2, 1));
        let mix = super::super::standard_event_mix();
        let f = event_figures(counts, &det, &mix[..2]);
        assert_eq!((f.f1, f.best_threshold, f.f1_at_documented_threshold), (1.0, 0.3, None));
        assert_eq!(f.by_kind.iter().map(|k| (k.events, k.recall)).collect::<Vec<_>>(), vec![(1, 1.0), (1, 1.0)]);
    }

    #[test]
    fn kinds_are_named_by_what_they_reveal() {
        let k = |kind: &str, f1| KindFigures { kind: kind.into(), events: 3, recall: f1, f1 };
        let st = Strongest {
            strategy: "x".into(),
            nrmse: 0.0,
            nrmse_strategy: "x".into(),
            habit_nrmse: None,
            daily_energy_error: 0.0,
            daily_energy_strategy: "x".into(),
            event_f1: None,
            event_precision: None,
            event_recall: None,
            event_threshold: None,
            event_threshold_unit: None,
            event_f1_tuned_elsewhere: None,
            event_by_kind: vec![k("kettle", 0.1), k("washer", 0.8), k("car", 0.9), k("oven", 0.4)],
        };
        assert_eq!(
            kinds_in_words(&st),
            "A captured meter still reveals washer (F1 0.80) and car (F1 0.90). It partly reveals oven (F1 0.40). \
             It mostly hides kettle (F1 0.10)."
        );
    }
}
