//! Per-reading mechanism figures of the audit against an independent numerical
//! computation in Python (`tests/reference/mechanism_figures.py`): mutual
//! information by scipy.integrate.quad, epsilon by scipy.optimize on scipy.stats
//! log-probabilities (scipy version printed; pinned in requirements.txt).

mod common;

use meterveil_shared::audit::{ldp_epsilon, mutual_information_bits};
use meterveil_shared::{DitherProfile, DitherProfileSpec};

/// Equal-weight points at the midpoints of N equal-probability bins of a density.
fn quantile_sample(name: &str, n: usize) -> Vec<f64> {
    (0..n)
        .map(|i| {
            let u = (i as f64 + 0.5) / n as f64;
            match name {
                "uniform_0_4" => 4.0 * u,
                "exponential_0.8_to_6" => -0.8 * (1.0 - u * (1.0 - (-6.0f64 / 0.8).exp())).ln(),
                other => panic!("unknown density {other}"),
            }
        })
        .collect()
}

#[test]
fn mutual_information_and_epsilon_match_scipy() {
    let r = common::python_json("mechanism_figures.py", &[]);
    eprintln!("reference: scipy {}", r["scipy"]);
    for c in r["cases"].as_array().expect("cases") {
        let p = DitherProfile::try_from(DitherProfileSpec {
            noise: c["noise"].as_str().expect("noise").into(),
            scale_kw: c["scale"].as_f64().expect("scale"),
            boundaries_kw: c["bounds"].as_array().expect("bounds").iter().map(|b| b.as_f64().expect("b")).collect(),
            interval_s: 900,
            send_registers: false,
            register_period: None,
        })
        .expect("profile");
        for (name, want) in c["mutual_information_bits"].as_object().expect("mi") {
            let got = mutual_information_bits(&p, &quantile_sample(name, 20_000));
            let want = want.as_f64().expect("f64");
            eprintln!("{} {name}: MI {got:.6} bits, scipy.integrate {want:.6}", p.describe());
            assert!((got - want).abs() < 2e-4, "{name}: {got} vs {want}");
        }
        for (range, hi) in [("0_4", 4.0), ("0_15", 15.0)] {
            let want = c["epsilon"][range].as_f64().expect("eps");
            let got = ldp_epsilon(&p, 0.0, hi);
            eprintln!("{} epsilon over [0, {hi}] kW: {got:.6}, scipy {want:.6}", p.describe());
            assert!((got - want).abs() <= 1e-6 * want.max(1.0), "{got} vs {want}");
        }
    }
}
