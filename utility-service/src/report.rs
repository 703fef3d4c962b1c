//! Self-contained HTML reports of an audit and of a calibration: inline SVG
//! charts drawn with plotters, no scripts, no external resources. Markup is
//! written with maud, which escapes every value it inserts.

use maud::{html, Markup, PreEscaped, DOCTYPE};
use meterveil_shared::audit::{AuditReport, CurvePoint};
use meterveil_shared::calibrate::Calibration;
use plotters::prelude::*;

type Area<'a> = DrawingArea<SVGBackend<'a>, plotters::coord::Shift>;
type Plot<'a, 'b> = ChartContext<
    'a,
    SVGBackend<'b>,
    Cartesian2d<plotters::coord::types::RangedCoordf64, plotters::coord::types::RangedCoordf64>,
>;
type Drawn = Result<(), Box<dyn std::error::Error>>;

/// An SVG chart of `size` pixels drawn by `draw` on white. A drawing error is
/// logged and leaves what was drawn before it.
fn svg(size: (u32, u32), draw: impl FnOnce(&Area) -> Drawn) -> String {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, size).into_drawing_area();
        let drawn = root.fill(&WHITE).map_err(Into::into).and_then(|()| draw(&root));
        if let Err(e) = drawn.and_then(|()| root.present().map_err(Into::into)) {
            tracing::warn!(error = %e, "chart could not be drawn");
        }
    }
    out
}

/// The legend, top right, over the headroom each chart leaves above its data.
fn legend<'a, 'b: 'a>(chart: &mut Plot<'a, 'b>) -> Drawn {
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()?;
    Ok(())
}

/// A line chart of several series over a shared x axis, as an SVG string.
pub(crate) fn line_chart(
    title: &str,
    x_label: &str,
    y_label: &str,
    series: &[(&str, Vec<(f64, f64)>)],
    y_max: f64,
) -> String {
    svg((720, 420), |root| {
        let xs: Vec<f64> = series.iter().flat_map(|s| s.1.iter().map(|p| p.0)).collect();
        let (x0, x1) = xs.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| (a.min(*x), b.max(*x)));
        let (x0, x1) = if x0.is_finite() && x1 > x0 { (x0, x1) } else { (0.0, 1.0) };
        // Headroom above the data, one legend row per series, keeps the legend off it.
        let top = y_max * (1.05 + 0.09 * series.len() as f64);
        let mut chart = ChartBuilder::on(root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(52)
            .build_cartesian_2d(x0..x1, 0.0..top)?;
        chart.configure_mesh().x_desc(x_label).y_desc(y_label).light_line_style(WHITE.mix(0.0)).draw()?;
        for (i, (name, pts)) in series.iter().enumerate() {
            let color = Palette99::pick(i).to_rgba();
            chart
                .draw_series(LineSeries::new(pts.iter().copied(), color.stroke_width(2)))?
                .label(*name)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
            chart.draw_series(pts.iter().map(|p| Circle::new(*p, 3, color.filled())))?;
        }
        legend(&mut chart)
    })
}

fn curve_series(points: &[CurvePoint], x: impl Fn(&CurvePoint) -> f64) -> Vec<(&'static str, Vec<(f64, f64)>)> {
    vec![
        ("strongest attacker: event F1", points.iter().map(|p| (x(p), p.strongest_event_f1)).collect()),
        ("utility: event F1", points.iter().map(|p| (x(p), p.utility_event_f1)).collect()),
        ("strongest attacker: nRMSE", points.iter().map(|p| (x(p), p.strongest_nrmse)).collect()),
        ("utility: nRMSE", points.iter().map(|p| (x(p), p.utility_nrmse)).collect()),
    ]
}

pub(crate) const STYLE: &str = "body{font-family:sans-serif;max-width:58em;margin:2em auto;padding:0 1em;color:#222}\
table{border-collapse:collapse}td,th{border:1px solid #bbb;padding:.25em .6em;text-align:right}\
th:first-child,td:first-child{text-align:left}.caution{background:#fff4e0;border-left:4px solid #e0a030;padding:.6em 1em}\
.problem{border-left:4px solid #b04040;padding:.4em 1em}";

/// A whole report page: title, the shared style, and `body` under the heading.
pub(crate) fn report_page(title: &str, body: Markup) -> String {
    html! {
        (DOCTYPE)
        html lang="en" {
            head { meta charset="utf-8"; title { (title) } style { (PreEscaped(STYLE)) } }
            body { h1 { (title) } (body) }
        }
    }
    .into_string()
}

/// A figure to three decimals, or a dash when there is none.
fn opt3(v: Option<f64>) -> String {
    v.map_or("–".into(), |v| format!("{v:.3}"))
}

/// The audit's report: a plain-language summary, its limits, tables and charts.
pub fn audit_html(title: &str, r: &AuditReport) -> String {
    report_page(
        title,
        html! {
            (audit_summary(r))
            h2 { "Assumptions" }
            ul { @for a in &r.assumptions { li { (a) } } }
            (audit_kinds(r))
            (audit_strategies(r))
            (audit_mechanism(r))
            (audit_curves(r))
            (audit_direct(r))
        },
    )
}

fn audit_summary(r: &AuditReport) -> Markup {
    let f1 = r.strongest.event_f1.unwrap_or(0.0);
    html! {
        h2 { "In plain words" }
        p {
            (format!(
                "If someone captured the uploads of {} of this feeder's {} meters for {} days, the strongest attack we \
                 know ({}) would find appliance events of the kind injected here with an F1 score of {:.2} (1 is every \
                 event and nothing else; 0 is nothing). Its best reconstruction of the meters' loads is off by {:.0}% \
                 (nRMSE). The utility, recovering the whole feeder, reaches {:.0}% and an event F1 of {:.2} on the same \
                 meters. Each reading carries {:.2} bits about the load, of at most {:.2}.",
                r.captured_meters,
                r.population,
                r.days,
                r.strongest.strategy,
                f1,
                100.0 * r.strongest.nrmse,
                100.0 * r.utility.nrmse,
                r.utility.event_f1.unwrap_or(0.0),
                r.mechanism.mutual_information_bits,
                r.mechanism.level_bits
            ))
        }
        p { (meterveil_shared::audit::kinds_in_words(&r.strongest)) }
        @if let Some(t) = r.strongest.event_f1_tuned_elsewhere {
            p {
                (format!(
                    "With each strategy's threshold tuned on {} other simulated households instead of the captured \
                     ones, the strongest event F1 is {t:.2}: an attacker that cannot tune on the victim does about \
                     this well.",
                    r.tuning_meters
                ))
            }
        }
        @if r.base_checks.iter().any(|c| c.replaced) {
            p {
                "The recovered profile of a captured meter predicted far more high readings than it sent; the audit \
                 used a per-slot estimate from its own uploads instead, so as not to understate the attacker."
            }
        }
        p {
            "A long history still shows a household's habits: folding a meter's own days together recovers its \
             typical day whatever the dither, so the reconstruction error alone does not measure privacy. What \
             dither protects is what happened on a given day."
        }
        p.caution { (r.caution) }
    }
}

fn audit_kinds(r: &AuditReport) -> Markup {
    html! {
        @if !r.strongest.event_by_kind.is_empty() {
            h2 { "Per event kind" }
            table {
                tr { th { "event kind" } th { "events injected" } th { "strongest F1" } th { "recall" } }
                @for k in &r.strongest.event_by_kind {
                    tr { td { (k.kind) } td { (k.events) } td { (format!("{:.3}", k.f1)) } td { (format!("{:.3}", k.recall)) } }
                }
            }
            p { "Per kind, the best strategy's recall of that kind paired with its overall precision." }
        }
    }
}

fn audit_strategies(r: &AuditReport) -> Markup {
    let u = &r.utility;
    html! {
        h2 { "Every strategy" }
        table {
            tr {
                th { "strategy" } th { "nRMSE" } th { "habit nRMSE" } th { "daily energy error" } th { "event F1" }
                th { "at threshold" } th { "F1, threshold tuned elsewhere" } th { "F1 at 1 kW" }
            }
            @for s in &r.strategies {
                @let e = s.events.as_ref();
                tr {
                    td { (s.strategy) }
                    td { (format!("{:.3}", s.nrmse)) }
                    td { (opt3(s.habit_nrmse)) }
                    td { (format!("{:.1}%", 100.0 * s.daily_energy_error)) }
                    td { (opt3(e.map(|e| e.f1))) }
                    td { (e.map_or("–".into(), |e| format!("{} {}", e.best_threshold, e.threshold_unit))) }
                    td { (opt3(e.and_then(|e| e.f1_tuned_elsewhere))) }
                    td { (opt3(e.and_then(|e| e.f1_at_documented_threshold))) }
                }
            }
            tr {
                td { "utility (whole feeder)" }
                td { (format!("{:.3}", u.nrmse)) }
                td { (opt3(u.habit_nrmse)) }
                td { (format!("{:.1}%", 100.0 * u.daily_energy_error)) }
                td { (format!("{:.3}", u.event_f1.unwrap_or(0.0))) }
                td { "–" }
                td { "–" }
                td { (opt3(u.event_f1_at_documented_threshold)) }
            }
        }
    }
}

fn audit_mechanism(r: &AuditReport) -> Markup {
    let m = &r.mechanism;
    html! {
        h2 { "The mechanism alone" }
        p {
            (format!(
                "Mutual information between a reading and its level: {:.3} bits. Local differential-privacy epsilon \
                 over [{}, {}] kW: {:.1}; over the feeder's usual range [0, {:.2}] kW: {:.1}. {}.",
                m.mutual_information_bits,
                m.ldp_range_kw[0],
                m.ldp_range_kw[1],
                m.ldp_epsilon,
                m.ldp_typical_range_kw[1],
                m.ldp_epsilon_typical,
                m.note
            ))
        }
    }
}

fn audit_curves(r: &AuditReport) -> Markup {
    let captured = curve_series(&r.curve_captured, |p| p.captured as f64);
    let days = curve_series(&r.curve_days, |p| p.days as f64);
    html! {
        @if !r.curve_captured.is_empty() {
            h2 { "More captured meters" }
            (PreEscaped(line_chart("Attacker and utility against captured meters", "captured meters", "F1 / nRMSE", &captured, 1.2)))
        }
        @if !r.curve_days.is_empty() {
            h2 { "Longer history" }
            (PreEscaped(line_chart("Attacker and utility against days of history", "days of history", "F1 / nRMSE", &days, 1.2)))
        }
    }
}

fn audit_direct(r: &AuditReport) -> Markup {
    html! {
        @if let Some(d) = &r.direct {
            h2 { "On the stored data" }
            p { (d.note) }
            table {
                tr { th { "strategy" } th { "nRMSE to the utility's recovery" } th { "daily energy difference" } }
                @for s in &d.strategies {
                    tr { td { (s.strategy) } td { (format!("{:.3}", s.nrmse)) } td { (format!("{:.1}%", 100.0 * s.daily_energy_error)) } }
                }
            }
        }
    }
}

/// The calibration's report: the recommendation or why there is none, and the trade-off curves.
pub fn calibration_html(title: &str, c: &Calibration) -> String {
    let mut sets: Vec<(meterveil_shared::RegisterPeriod, Vec<f64>)> = Vec::new();
    for p in &c.curve {
        let key = (p.register_period, p.boundaries_kw.clone());
        if !sets.contains(&key) {
            sets.push(key);
        }
    }
    let mut series: Vec<(String, Vec<(f64, f64)>)> = Vec::new();
    for (period, b) in &sets {
        let pts: Vec<_> = c.curve.iter().filter(|p| &p.boundaries_kw == b && p.register_period == *period).collect();
        let name = format!("{} reads, {} levels {:?}", period.as_str(), b.len() + 1, b);
        series.push((format!("{name}: attacker F1"), pts.iter().map(|p| (p.scale_kw, p.attacker_event_f1)).collect()));
        series.push((
            format!("{name}: utility energy error ×5"),
            pts.iter().map(|p| (p.scale_kw, 5.0 * p.utility_daily_energy_error)).collect(),
        ));
    }
    let refs: Vec<(&str, Vec<(f64, f64)>)> = series.iter().map(|(n, v)| (n.as_str(), v.clone())).collect();
    let chart = line_chart("Trade-off against the dither scale", "scale (kW)", "F1 / 5 × energy error", &refs, 1.0);
    report_page(
        title,
        html! {
            p { strong { (if c.meets_targets { "Targets met." } else { "Targets not met." }) } }
            p { (c.message) }
            p {
                (format!(
                    "Recommended profile: {} dither, scale {:.2} kW, boundaries {:?} kW.",
                    c.recommended.noise, c.recommended.scale_kw, c.recommended.boundaries_kw
                ))
            }
            (PreEscaped(chart))
            table {
                tr {
                    th { "register reads" } th { "levels" } th { "scale kW" } th { "attacker F1" } th { "strategy" }
                    th { "utility daily energy error" }
                    th { (format!("group load nRMSE, {} meters", c.targets.group_size)) }
                    th { "band energy error" } th { "interval nRMSE" }
                }
                @for p in &c.curve {
                    tr {
                        td { (p.register_period.as_str()) }
                        td { (p.levels) }
                        td { (format!("{:.3}", p.scale_kw)) }
                        td { (format!("{:.3}", p.attacker_event_f1)) }
                        td { (p.attacker_strategy) }
                        td { (format!("{:.1}%", 100.0 * p.utility_daily_energy_error)) }
                        td { (format!("{:.1}%", 100.0 * p.utility_group_nrmse)) }
                        td { (p.utility_band_energy_error.map_or("no calendar".into(), |e| format!("{:.1}%", 100.0 * e))) }
                        td { (format!("{:.2}", p.utility_nrmse)) }
                    }
                }
            }
            (calibration_searches(c))
            p.caution { (meterveil_shared::audit::CAUTION) }
        },
    )
}

/// How each level set's search for its smallest safe scale ended.
fn calibration_searches(c: &Calibration) -> Markup {
    html! {
        @if !c.searches.is_empty() {
            h2 { "How each search ended" }
            table {
                tr { th { "register reads" } th { "levels" } th { "bracket kW" } th { "iterations" } th { "stop" } }
                @for sc in &c.searches {
                    tr {
                        td { (sc.register_period.as_str()) }
                        td { (sc.levels) }
                        td { (sc.bracket_kw.map_or("–".into(), |(a, b)| format!("{a:.3} – {b:.3}"))) }
                        td { (sc.iterations) }
                        td { (serde_json::to_value(&sc.stop).ok().map(|v| v.to_string().trim_matches('"').to_owned()).unwrap_or_default()) }
                    }
                }
            }
        }
    }
}

/// A meter's recovered profile with its band, and its stored levels drawn at
/// their band's lower boundary, over hours from `t0`.
pub(crate) fn profile_chart(
    title: &str,
    x_label: &str,
    t0: i64,
    recovered: &[(i64, f64, f64, f64)],
    levels: &[(i64, f64)],
) -> String {
    svg((900, 360), |root| {
        let h = |t: i64| (t - t0) as f64 / 3600.0;
        let x1 = recovered.last().map_or(24.0, |r| h(r.0)).max(1.0);
        let y1 = recovered.iter().map(|r| r.3).chain(levels.iter().map(|l| l.1)).fold(1.0f64, f64::max) * 1.45;
        let mut chart = ChartBuilder::on(root)
            .caption(title, ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(52)
            .build_cartesian_2d(0.0..x1, 0.0..y1)?;
        chart.configure_mesh().x_desc(x_label).y_desc("kW").draw()?;
        let band: Vec<(f64, f64)> =
            recovered.iter().map(|r| (h(r.0), r.3)).chain(recovered.iter().rev().map(|r| (h(r.0), r.2))).collect();
        chart
            .draw_series(std::iter::once(Polygon::new(band, BLUE.mix(0.18).filled())))?
            .label("95% band")
            .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 18, y + 5)], BLUE.mix(0.18).filled()));
        chart
            .draw_series(LineSeries::new(recovered.iter().map(|r| (h(r.0), r.1)), BLUE.stroke_width(2)))?
            .label("recovered kW")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLUE.stroke_width(2)));
        if !levels.is_empty() {
            chart
                .draw_series(levels.iter().map(|l| Circle::new((h(l.0), l.1), 2, RED.mix(0.6).filled())))?
                .label("stored level (its lower boundary, kW)")
                .legend(|(x, y)| Circle::new((x + 9, y), 3, RED.filled()));
        }
        // Headroom above the data keeps the legend, top right, off it.
        legend(&mut chart)
    })
}

/// The privacy trade-off across profile versions: the strongest attacker's
/// event F1 (y) against the utility's daily-energy error in percent (x), one
/// marked point per audit, grouped by the profile version it audited; a
/// calibration's candidate settings as a line; the operator's targets as a
/// dashed box (the acceptable corner is below and left of it).
pub(crate) fn tradeoff_chart(
    audits: &[(String, Vec<(f64, f64)>)],
    candidates: Option<(&str, &[(f64, f64)])>,
    targets: Option<(f64, f64)>,
) -> String {
    svg((760, 400), |root| {
        let xs = audits.iter().flat_map(|a| a.1.iter().map(|p| p.0));
        let xs = xs.chain(candidates.iter().flat_map(|c| c.1.iter().map(|p| p.0)));
        let x1 = xs.chain(targets.map(|t| t.0)).fold(1.0f64, f64::max) * 1.15;
        let rows = audits.len() + usize::from(candidates.is_some()) + usize::from(targets.is_some());
        // One legend row per series, in headroom above F1 = 1.
        let y1 = 1.05 + 0.09 * rows as f64;
        let mut chart = ChartBuilder::on(root)
            .caption("Attacker event F1 against the utility's error, by profile version", ("sans-serif", 17))
            .margin(12)
            .x_label_area_size(42)
            .y_label_area_size(52)
            .build_cartesian_2d(0.0..x1, 0.0..y1)?;
        chart
            .configure_mesh()
            .x_desc("utility daily-energy error (%)")
            .y_desc("strongest attacker's event F1")
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        if let Some((name, pts)) = candidates {
            let grey = RGBColor(120, 120, 120);
            chart
                .draw_series(LineSeries::new(pts.iter().copied(), grey.stroke_width(1)))?
                .label(name)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], grey.stroke_width(1)));
            chart.draw_series(pts.iter().map(|p| Cross::new(*p, 3, grey.stroke_width(1))))?;
        }
        for (i, (name, pts)) in audits.iter().enumerate() {
            let color = Palette99::pick(i).to_rgba();
            chart
                .draw_series(pts.iter().map(|p| Circle::new(*p, 5, color.filled())))?
                .label(name.as_str())
                .legend(move |(x, y)| Circle::new((x + 9, y), 5, color.filled()));
        }
        if let Some((tx, ty)) = targets {
            let edge = vec![(0.0, ty), (tx, ty), (tx, 0.0)];
            chart
                .draw_series(DashedLineSeries::new(edge, 6, 4, BLACK.stroke_width(1)))?
                .label("targets (meet them below and left)")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLACK.stroke_width(1)));
        }
        legend(&mut chart)
    })
}
