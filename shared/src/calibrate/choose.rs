//! The recommendation among the evaluated candidates, and the words that say it.

use super::{CalibrationConfig, Targets, TradeoffPoint};
use crate::error::FieldError;
use crate::profile::DitherProfile;

/// One of the utility's figures beside its bound.
struct Figure {
    /// "daily-energy error", "group load nRMSE (50 meters)", …
    name: String,
    value: f64,
    bound: f64,
    /// Shown as a percentage (fractions) or as a plain number.
    percent: bool,
}

impl Figure {
    fn show(&self, v: f64) -> String {
        if self.percent {
            format!("{:.1}%", 100.0 * v)
        } else {
            format!("{v:.2}")
        }
    }
    /// value / bound; NaN (a figure that could not be measured) never meets.
    fn ratio(&self) -> f64 {
        if self.value.is_nan() {
            f64::INFINITY
        } else {
            self.value / self.bound
        }
    }
}

/// The utility's figures of a candidate that the targets bound.
fn figures(t: &Targets, p: &TradeoffPoint) -> Vec<Figure> {
    let mut f = vec![Figure {
        name: "daily-energy error".into(),
        value: p.utility_daily_energy_error,
        bound: t.daily_energy_error_max,
        percent: true,
    }];
    if let Some(b) = t.group_nrmse_max {
        f.push(Figure {
            name: format!("group-load nRMSE ({} meters)", t.group_size),
            value: p.utility_group_nrmse,
            bound: b,
            percent: true,
        });
    }
    if let Some(b) = t.band_energy_error_max {
        f.push(Figure {
            name: "band-energy error".into(),
            value: p.utility_band_energy_error.unwrap_or(f64::NAN),
            bound: b,
            percent: true,
        });
    }
    if let Some(b) = t.profile_nrmse_max {
        f.push(Figure { name: "interval nRMSE".into(), value: p.utility_nrmse, bound: b, percent: false });
    }
    f
}

/// "daily register reads", "no register reads".
fn reads(p: &TradeoffPoint) -> String {
    match p.register_period {
        crate::profile::RegisterPeriod::None => "no register reads".into(),
        other => format!("{} register reads", other.as_str()),
    }
}

/// The worst ratio of the utility's figures to their bounds (≤ 1: all met).
fn utility_ratio(t: &Targets, p: &TradeoffPoint) -> f64 {
    figures(t, p).iter().map(Figure::ratio).fold(0.0, f64::max)
}

/// "daily-energy error 4.1% (target ≤ 10.0%), …".
fn figures_in_words(t: &Targets, p: &TradeoffPoint) -> String {
    let mut parts: Vec<String> = figures(t, p)
        .iter()
        .map(|f| format!("{} {} (target ≤ {})", f.name, f.show(f.value), f.show(f.bound)))
        .collect();
    if t.profile_nrmse_max.is_none() {
        parts.push(format!("interval nRMSE {:.2} (no target)", p.utility_nrmse));
    }
    parts.join(", ")
}

/// The recommendation (the safe point whose worst utility figure is furthest
/// inside its bound), whether it meets the targets, and the message; or the
/// closest trade-off and why none does.
pub(super) fn choose(
    cfg: &CalibrationConfig,
    current: &DitherProfile,
    curve: &[TradeoffPoint],
    best_per_set: &[TradeoffPoint],
    aim: f64,
) -> Result<(TradeoffPoint, bool, String), FieldError> {
    let t = &cfg.targets;
    let accurate = |p: &TradeoffPoint| utility_ratio(t, p) <= 1.0;
    let feasible =
        best_per_set.iter().filter(|p| accurate(p)).min_by(|a, b| utility_ratio(t, a).total_cmp(&utility_ratio(t, b)));
    if let Some(p) = feasible {
        let message = format!(
            "{} levels at σ {:.3} kW, {}: the strongest attacker holding {} meter(s) detects events with F1 {:.2} \
             (target ≤ {:.2}, searched at {:.2}); the utility's {}",
            p.levels,
            p.scale_kw,
            reads(p),
            t.captured,
            p.attacker_event_f1,
            t.event_f1_max,
            aim,
            figures_in_words(t, p),
        );
        return Ok((p.clone(), true, message));
    }
    let worst = |p: &TradeoffPoint| (p.attacker_event_f1 / t.event_f1_max).max(utility_ratio(t, p));
    let p = curve
        .iter()
        .min_by(|a, b| worst(a).total_cmp(&worst(b)))
        .cloned()
        .ok_or_else(|| FieldError::new("level_sets", "no candidate could be evaluated"))?;
    let why = if best_per_set.is_empty() {
        format!("no scale up to {} kW brings the attacker's event F1 to {aim:.2}", cfg.scale_range_kw.1)
    } else {
        // Per level set and period, what its least safe dither leaves off target.
        let misses: Vec<String> = best_per_set
            .iter()
            .map(|b| {
                let off: Vec<String> = figures(t, b)
                    .iter()
                    .filter(|f| f.ratio() > 1.0)
                    .map(|f| format!("{} {} above {}", f.name, f.show(f.value), f.show(f.bound)))
                    .collect();
                format!("{} levels at σ {:.2} kW with {}: {}", b.levels, b.scale_kw, reads(b), off.join(", "))
            })
            .collect();
        format!(
            "the least dither that brings the attacker's event F1 to {aim:.2} misses a utility target ({})",
            misses.join("; ")
        )
    };
    let margin_note = if p.attacker_event_f1 <= t.event_f1_max && accurate(&p) {
        format!(
            " It meets the stated bounds, but not the search's margin (F1 ≤ {aim:.2}) against Monte Carlo \
             scatter: a fresh simulation may exceed the F1 bound."
        )
    } else {
        String::new()
    };
    let advice = if current.send_registers() {
        "Relax a target."
    } else {
        "Relax a target, or send register reads (exact daily energy to the utility, and to an eavesdropper)."
    };
    let msg = format!(
        "The targets cannot both be met: {why}. Closest trade-off: {} levels at σ {:.3} kW, attacker F1 {:.2}, \
         utility's {}.{margin_note} {advice}",
        p.levels,
        p.scale_kw,
        p.attacker_event_f1,
        figures_in_words(t, &p),
    );
    Ok((p, false, msg))
}
