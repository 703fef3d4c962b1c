//! The demo's printed summary.

use std::fmt::Write as _;

use super::{DemoSummary, PrivacyCheck};

/// The printed summary.
pub fn render(s: &DemoSummary) -> String {
    let mut o = String::new();
    render_town(&mut o, s);
    render_recoveries(&mut o, s);
    render_clusters(&mut o, s);
    if let Some(p) = &s.privacy {
        render_privacy(&mut o, p);
    }
    super::calibrations::render_calibrations(&mut o, &s.calibrations);
    render_feeder_audits(&mut o, s);
    let _ = writeln!(o, "\n  database: {}", s.database.display());
    let _ = writeln!(
        o,
        "\n  Stored are quantizer levels only. The dither hides what a household did in a\n  \
         given interval from anyone who intercepts the uploads, but a long history still\n  \
         shows its habits, and the utility's population model recovers daily shapes.\n  \
         Dithering is a privacy measure with limits, not a guarantee: obligations follow\n  \
         local regulation and the utility's privacy officer."
    );
    o
}

/// The town, its uploads and its feeders.
fn render_town(o: &mut String, s: &DemoSummary) {
    let sim = &s.simulation;
    let _ = writeln!(o, "\nMeterveil demo: the town of {} ({} days of 15-minute data)", sim.town, sim.days);
    let _ = writeln!(o, "  meters {}  feeders {}  gateways {}", sim.meters, sim.feeders, sim.gateways);
    let _ = writeln!(
        o,
        "  readings generated {}  levels uploaded {}  stored {}  rejected {}  duplicates {}",
        sim.readings_generated, sim.readings_acknowledged, s.readings_stored, s.readings_rejected, s.duplicates
    );
    let _ = writeln!(
        o,
        "  register reads queued {}  upload retries {}  refused batches {}  wall time {:.1} s",
        sim.registers_queued, sim.transient_failures, sim.refused_batches, sim.elapsed_s
    );
    let _ = writeln!(o, "\n  {:<16} {:>6} {:>9} {:>9}  dither profile", "feeder", "meters", "readings", "registers");
    for f in &s.feeders {
        let profile = f.current_profile.as_ref().map_or_else(|| "none".into(), |p| p.describe());
        let _ =
            writeln!(o, "  {:<16} {:>6} {:>9} {:>9}  {}", f.feeder_id, f.meters, f.readings, f.register_reads, profile);
    }
}

/// One recovery per feeder, scored against the simulated truth.
fn render_recoveries(o: &mut String, s: &DemoSummary) {
    let _ = writeln!(
        o,
        "\n  Recovered profiles (one job per feeder; accuracy against the simulated truth, which only a demo has):"
    );
    let _ = writeln!(
        o,
        "  {:<16} {:>4} {:>5} {:>7} {:>9} {:>8} {:>13} {:>7} {:>14}",
        "feeder", "rank", "iters", "time s", "corrected", "atypical", "reg. periods", "nRMSE", "day energy err"
    );
    for r in &s.recoveries {
        let _ = writeln!(
            o,
            "  {:<16} {:>4} {:>5} {:>7.1} {:>9} {:>8} {:>13} {:>7.3} {:>13.1}%",
            r.feeder_id,
            r.rank,
            r.iterations,
            r.wall_s,
            r.corrected,
            r.atypical,
            r.register_days,
            r.nrmse,
            100.0 * r.median_daily_energy_error
        );
    }
}

/// The town's load-shape clusters.
fn render_clusters(o: &mut String, s: &DemoSummary) {
    let _ = writeln!(
        o,
        "\n  Load-shape clusters ({} found by the stability rule, from a rank-{} fit of each feeder's levels).\n  Coherence: the share of the members' self-expression weight that stays inside the cluster.\n  Unassigned: members with most of their weight elsewhere, fitting no cluster well.",
        s.clusters.len(),
        meterveil_shared::cluster::CLUSTER_RANK
    );
    let _ = writeln!(
        o,
        "  {:>7} {:>9} {:>10} {:>12} {:>12} {:>12}  simulated kinds (demo only)",
        "members", "coherence", "unassigned", "weekday peak", "weekday kWh", "weekend kWh"
    );
    for c in &s.clusters {
        let kinds: Vec<String> = c.kinds.iter().take(3).map(|(k, n)| format!("{k} {n}")).collect();
        let _ = writeln!(
            o,
            "  {:>7} {:>9.2} {:>10} {:>12} {:>12.1} {:>12.1}  {}",
            c.size,
            c.coherence,
            c.unassigned,
            c.weekday_peak,
            c.weekday_kwh,
            c.weekend_kwh,
            kinds.join(", ")
        );
    }
}

/// Each feeder audited at its own register period.
fn render_feeder_audits(o: &mut String, s: &DemoSummary) {
    if !s.feeder_audits.is_empty() {
        let _ = writeln!(
            o,
            "\n  Each feeder at its own register period (one captured meter, the strongest attacker's event F1\n  and the utility's median daily-energy error on that meter):"
        );
        let _ = writeln!(o, "  {:<16} {:<15} {:>9} {:>11}", "feeder", "register reads", "event F1", "day energy");
        for a in &s.feeder_audits {
            let _ = writeln!(
                o,
                "  {:<16} {:<15} {:>9.2} {:>10.1}%",
                a.feeder_id,
                a.register_period,
                a.event_f1,
                100.0 * a.daily_energy_error
            );
        }
    }
}

fn render_privacy(o: &mut String, p: &PrivacyCheck) {
    let a = &p.audit;
    let f = |v: &serde_json::Value| v.as_f64().unwrap_or(f64::NAN);
    let _ = writeln!(
        o,
        "\n  Privacy audit of {} (parametric bootstrap: appliance events injected into {}'s recovered profile,\n  \
         levels re-drawn, every known attack run on that one meter's {} days):",
        p.feeder_id, p.captured, a["days"]
    );
    let _ = writeln!(o, "  {:<22} {:>7} {:>12} {:>9}", "strategy", "nRMSE", "day energy", "event F1");
    for s in a["strategies"].as_array().into_iter().flatten() {
        let _ = writeln!(
            o,
            "  {:<22} {:>7.3} {:>11.1}% {:>9.3}",
            s["strategy"].as_str().unwrap_or("?"),
            f(&s["nrmse"]),
            100.0 * f(&s["daily_energy_error"]),
            f(&s["events"]["f1"])
        );
    }
    let u = &a["utility"];
    let _ = writeln!(
        o,
        "  {:<22} {:>7.3} {:>11.1}% {:>9.3}   (whole-feeder recovery, same meter)",
        "utility",
        f(&u["nrmse"]),
        100.0 * f(&u["daily_energy_error"]),
        f(&u["event_f1"])
    );
    let st = &a["strongest"];
    let _ = writeln!(
        o,
        "  strongest attacker: event F1 {:.2} ({}), nRMSE {:.3} ({}).",
        f(&st["event_f1"]),
        st["strategy"].as_str().unwrap_or("?"),
        f(&st["nrmse"]),
        st["nrmse_strategy"].as_str().unwrap_or("?")
    );
    let _ = writeln!(
        o,
        "  at thresholds tuned on other simulated households: event F1 {:.2}.",
        f(&st["event_f1_tuned_elsewhere"])
    );
    if let Ok(s) = serde_json::from_value::<meterveil_shared::audit::Strongest>(st.clone()) {
        let _ = writeln!(o, "  {}", meterveil_shared::audit::kinds_in_words(&s));
    }
    let m = &a["mechanism"];
    let _ = writeln!(
        o,
        "  per reading: {:.2} bits of {:.2} about the load; LDP epsilon {:.0} over [0, {}] kW (finite only\n  \
         because the dither has full support, and far too large to be a guarantee).",
        f(&m["mutual_information_bits"]),
        f(&m["level_bits"]),
        f(&m["ldp_epsilon"]),
        m["ldp_range_kw"][1]
    );
    let curve: Vec<String> = a["curve_captured"]
        .as_array()
        .into_iter()
        .flatten()
        .map(|c| format!("{} meters F1 {:.2}", c["captured"], f(&c["strongest_event_f1"])))
        .collect();
    let _ = writeln!(o, "  more captured meters: {}", curve.join(", "));
    let _ = writeln!(o, "  the same audit as if {} sent other register reads (what-ifs, without curves):", p.feeder_id);
    for a in &p.by_period {
        let _ = writeln!(
            o,
            "    {:<8} register reads: event F1 {:.2}, utility day-energy error {:.1}%",
            a.register_period,
            a.event_f1,
            100.0 * a.daily_energy_error
        );
    }
}
