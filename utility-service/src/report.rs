//! Self-contained HTML reports of an audit and of a calibration: inline SVG
//! charts drawn with plotters, no scripts, no external resources.

use meterveil_shared::audit::{AuditReport, CurvePoint};
use meterveil_shared::calibrate::Calibration;
use plotters::prelude::*;

pub(crate) fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

/// A line chart of several series over a shared x axis, as an SVG string.
pub(crate) fn line_chart(
    title: &str,
    x_label: &str,
    y_label: &str,
    series: &[(&str, Vec<(f64, f64)>)],
    y_max: f64,
) -> String {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (640, 360)).into_drawing_area();
        let draw = || -> Result<(), Box<dyn std::error::Error + '_>> {
            root.fill(&WHITE)?;
            let xs: Vec<f64> = series.iter().flat_map(|s| s.1.iter().map(|p| p.0)).collect();
            let (x0, x1) = xs.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| (a.min(*x), b.max(*x)));
            let (x0, x1) = if x0.is_finite() && x1 > x0 { (x0, x1) } else { (0.0, 1.0) };
            let mut chart = ChartBuilder::on(&root)
                .caption(title, ("sans-serif", 18))
                .margin(12)
                .x_label_area_size(40)
                .y_label_area_size(52)
                .build_cartesian_2d(x0..x1, 0.0..y_max)?;
            chart.configure_mesh().x_desc(x_label).y_desc(y_label).light_line_style(WHITE.mix(0.0)).draw()?;
            for (i, (name, pts)) in series.iter().enumerate() {
                let color = Palette99::pick(i).to_rgba();
                chart
                    .draw_series(LineSeries::new(pts.iter().copied(), color.stroke_width(2)))?
                    .label(*name)
                    .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
                chart.draw_series(pts.iter().map(|p| Circle::new(*p, 3, color.filled())))?;
            }
            chart.configure_series_labels().background_style(WHITE.mix(0.85)).border_style(BLACK).draw()?;
            root.present()?;
            Ok(())
        };
        if let Err(e) = draw() {
            tracing::warn!(error = %e, "chart could not be drawn");
        }
    }
    svg
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
th:first-child,td:first-child{text-align:left}.caution{background:#fff4e0;border-left:4px solid #e0a030;padding:.6em 1em}";

/// The audit's report: a plain-language summary, its limits, tables and charts.
pub fn audit_html(title: &str, r: &AuditReport) -> String {
    let f1 = r.strongest.event_f1.unwrap_or(0.0);
    let uf1 = r.utility.event_f1.unwrap_or(0.0);
    let mut h = format!("<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title><style>{STYLE}</style></head><body>", esc(title));
    h += &format!("<h1>{}</h1>", esc(title));
    h += &format!(
        "<h2>In plain words</h2><p>If someone captured the uploads of {} of this feeder's {} meters for {} days, \
         the strongest attack we know ({}) would find appliance events of the kind injected here with an F1 score of \
         {:.2} (1 is every event and nothing else; 0 is nothing). Its best reconstruction of the meters' loads is off \
         by {:.0}% (nRMSE). The utility, recovering the whole feeder, reaches {:.0}% and an event F1 of {:.2} on the same \
         meters. Each reading carries {:.2} bits about the load, of at most {:.2}.</p>",
        r.captured_meters,
        r.population,
        r.days,
        esc(&r.strongest.strategy),
        f1,
        100.0 * r.strongest.nrmse,
        100.0 * r.utility.nrmse,
        uf1,
        r.mechanism.mutual_information_bits,
        r.mechanism.level_bits
    );
    h += &format!("<p>{}</p>", esc(&meterveil_shared::audit::kinds_in_words(&r.strongest)));
    if let Some(t) = r.strongest.event_f1_tuned_elsewhere {
        h += &format!(
            "<p>With each strategy's threshold tuned on {} other simulated households instead of the captured ones, \
             the strongest event F1 is {t:.2}: an attacker that cannot tune on the victim does about this well.</p>",
            r.tuning_meters
        );
    }
    if r.base_checks.iter().any(|c| c.replaced) {
        h += "<p>The recovered profile of a captured meter predicted far more high readings than it sent; the audit \
              used a per-slot estimate from its own uploads instead, so as not to understate the attacker.</p>";
    }
    h += "<p>A long history still shows a household's habits: folding a meter's own days together recovers its \
          typical day whatever the dither, so the reconstruction error alone does not measure privacy. What dither \
          protects is what happened on a given day.</p>";
    h += &format!("<p class=\"caution\">{}</p>", esc(&r.caution));
    h += "<h2>Assumptions</h2><ul>";
    for a in &r.assumptions {
        h += &format!("<li>{}</li>", esc(a));
    }
    h += "</ul>";
    if !r.strongest.event_by_kind.is_empty() {
        h += "<h2>Per event kind</h2><table><tr><th>event kind</th><th>events injected</th><th>strongest F1</th><th>recall</th></tr>";
        for k in &r.strongest.event_by_kind {
            h += &format!(
                "<tr><td>{}</td><td>{}</td><td>{:.3}</td><td>{:.3}</td></tr>",
                esc(&k.kind),
                k.events,
                k.f1,
                k.recall
            );
        }
        h += "</table><p>Per kind, the best strategy's recall of that kind paired with its overall precision.</p>";
    }
    h += "<h2>Every strategy</h2><table><tr><th>strategy</th><th>nRMSE</th><th>habit nRMSE</th><th>daily energy error</th><th>event F1</th><th>at threshold</th><th>F1, threshold tuned elsewhere</th><th>F1 at 1 kW</th></tr>";
    for s in &r.strategies {
        let e = s.events.as_ref();
        h += &format!(
            "<tr><td>{}</td><td>{:.3}</td><td>{}</td><td>{:.1}%</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(&s.strategy),
            s.nrmse,
            s.habit_nrmse.map_or("–".into(), |v| format!("{v:.3}")),
            100.0 * s.daily_energy_error,
            e.map_or("–".into(), |e| format!("{:.3}", e.f1)),
            e.map_or("–".into(), |e| esc(&format!("{} {}", e.best_threshold, e.threshold_unit))),
            e.and_then(|e| e.f1_tuned_elsewhere).map_or("–".into(), |v| format!("{v:.3}")),
            e.and_then(|e| e.f1_at_documented_threshold).map_or("–".into(), |v| format!("{v:.3}")),
        );
    }
    h += &format!(
        "<tr><td>utility (whole feeder)</td><td>{:.3}</td><td>{}</td><td>{:.1}%</td><td>{:.3}</td><td>–</td><td>–</td><td>{}</td></tr></table>",
        r.utility.nrmse,
        r.utility.habit_nrmse.map_or("–".into(), |v| format!("{v:.3}")),
        100.0 * r.utility.daily_energy_error,
        uf1,
        r.utility.event_f1_at_documented_threshold.map_or("–".into(), |v| format!("{v:.3}")),
    );
    h += &format!(
        "<h2>The mechanism alone</h2><p>Mutual information between a reading and its level: {:.3} bits. \
         Local differential-privacy epsilon over [{}, {}] kW: {:.1}; over the feeder's usual range [0, {:.2}] kW: {:.1}. {}.</p>",
        r.mechanism.mutual_information_bits,
        r.mechanism.ldp_range_kw[0],
        r.mechanism.ldp_range_kw[1],
        r.mechanism.ldp_epsilon,
        r.mechanism.ldp_typical_range_kw[1],
        r.mechanism.ldp_epsilon_typical,
        esc(&r.mechanism.note)
    );
    if !r.curve_captured.is_empty() {
        h += "<h2>More captured meters</h2>";
        h += &line_chart(
            "Attacker and utility against captured meters",
            "captured meters",
            "F1 / nRMSE",
            &curve_series(&r.curve_captured, |p| p.captured as f64),
            1.2,
        );
    }
    if !r.curve_days.is_empty() {
        h += "<h2>Longer history</h2>";
        h += &line_chart(
            "Attacker and utility against days of history",
            "days of history",
            "F1 / nRMSE",
            &curve_series(&r.curve_days, |p| p.days as f64),
            1.2,
        );
    }
    if let Some(d) = &r.direct {
        h += &format!(
            "<h2>On the stored data</h2><p>{}</p><table><tr><th>strategy</th><th>nRMSE to the utility's recovery</th><th>daily energy difference</th></tr>",
            esc(&d.note)
        );
        for s in &d.strategies {
            h += &format!(
                "<tr><td>{}</td><td>{:.3}</td><td>{:.1}%</td></tr>",
                esc(&s.strategy),
                s.nrmse,
                100.0 * s.daily_energy_error
            );
        }
        h += "</table>";
    }
    h + "</body></html>\n"
}

/// The calibration's report: the recommendation or why there is none, and the trade-off curves.
pub fn calibration_html(title: &str, c: &Calibration) -> String {
    let mut h = format!("<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title><style>{STYLE}</style></head><body>", esc(title));
    h += &format!(
        "<h1>{}</h1><p><strong>{}</strong></p><p>{}</p>",
        esc(title),
        if c.meets_targets { "Targets met." } else { "Targets not met." },
        esc(&c.message)
    );
    h += &format!(
        "<p>Recommended profile: {} dither, scale {:.2} kW, boundaries {:?} kW.</p>",
        esc(&c.recommended.noise),
        c.recommended.scale_kw,
        c.recommended.boundaries_kw
    );
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
    h += &line_chart("Trade-off against the dither scale", "scale (kW)", "F1 / 5 × energy error", &refs, 1.0);
    h += "<table><tr><th>register reads</th><th>levels</th><th>scale kW</th><th>attacker F1</th><th>strategy</th><th>utility daily energy error</th></tr>";
    for p in &c.curve {
        h += &format!(
            "<tr><td>{}</td><td>{}</td><td>{:.3}</td><td>{:.3}</td><td>{}</td><td>{:.1}%</td></tr>",
            p.register_period.as_str(),
            p.levels,
            p.scale_kw,
            p.attacker_event_f1,
            esc(&p.attacker_strategy),
            100.0 * p.utility_daily_energy_error
        );
    }
    h += "</table>";
    h += &format!("<p class=\"caution\">{}</p>", esc(meterveil_shared::audit::CAUTION));
    h + "</body></html>\n"
}

/// A meter's recovered profile with its band, and its stored levels drawn at
/// their band's lower boundary, over hours from `t0`.
pub(crate) fn profile_chart(title: &str, t0: i64, recovered: &[(i64, f64, f64, f64)], levels: &[(i64, f64)]) -> String {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (900, 360)).into_drawing_area();
        let draw = || -> Result<(), Box<dyn std::error::Error + '_>> {
            root.fill(&WHITE)?;
            let h = |t: i64| (t - t0) as f64 / 3600.0;
            let x1 = recovered.last().map_or(24.0, |r| h(r.0)).max(1.0);
            let y1 = recovered.iter().map(|r| r.3).chain(levels.iter().map(|l| l.1)).fold(1.0f64, f64::max) * 1.1;
            let mut chart = ChartBuilder::on(&root)
                .caption(title, ("sans-serif", 18))
                .margin(12)
                .x_label_area_size(40)
                .y_label_area_size(52)
                .build_cartesian_2d(0.0..x1, 0.0..y1)?;
            chart.configure_mesh().x_desc("hours from the window start").y_desc("kW").draw()?;
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
            chart
                .draw_series(levels.iter().map(|l| Circle::new((h(l.0), l.1), 2, RED.mix(0.6).filled())))?
                .label("stored level (its lower boundary, kW)")
                .legend(|(x, y)| Circle::new((x + 9, y), 3, RED.filled()));
            chart.configure_series_labels().background_style(WHITE.mix(0.85)).border_style(BLACK).draw()?;
            root.present()?;
            Ok(())
        };
        if let Err(e) = draw() {
            tracing::warn!(error = %e, "chart could not be drawn");
        }
    }
    svg
}
