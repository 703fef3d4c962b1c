//! Helpers shared by the integration tests: running the Python reference scripts,
//! building test populations and scoring recoveries.
#![allow(dead_code)]

use std::process::Command;

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::LevelMatrix;
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, LogNormal};
use serde_json::Value;

/// A gaussian profile on 15-minute intervals without register reads.
pub fn gaussian_profile(scale_kw: f64, boundaries_kw: &[f64]) -> DitherProfile {
    DitherProfile::try_from(meterveil_shared::DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw,
        boundaries_kw: boundaries_kw.to_vec(),
        interval_s: 900,
        send_registers: false,
    })
    .expect("valid test profile")
}

/// Runs `tests/reference/<script>` with the reference interpreter and parses its JSON.
pub fn python_json(script: &str, args: &[&str]) -> Value {
    let python = std::env::var("METERVEIL_PYTHON").unwrap_or_else(|_| "python3".into());
    let path = format!("{}/../tests/reference/{script}", env!("CARGO_MANIFEST_DIR"));
    let out = Command::new(&python).arg(&path).args(args).output().unwrap_or_else(|e| {
        panic!("cannot run {python}: {e}; run the README test command, which installs the reference packages")
    });
    assert!(
        out.status.success(),
        "{script} failed (are the packages of tests/reference/requirements.txt installed?):\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("reference prints JSON")
}

/// BDEW class shapes (mean 1 kW over the year) for `days` days from 2023-01-09,
/// from the package demandlib (see tests/reference/bdew_profiles.py).
pub fn bdew_shapes(days: usize) -> (String, Vec<(String, Vec<f64>)>) {
    let v = python_json("bdew_profiles.py", &["2023", "1", "9", &days.to_string()]);
    let classes = v["classes"].as_object().expect("classes");
    let mut out: Vec<(String, Vec<f64>)> = classes
        .iter()
        .map(|(k, vals)| {
            (k.clone(), vals.as_array().expect("values").iter().map(|x| x.as_f64().expect("f64")).collect())
        })
        .collect();
    out.sort_by(|a, b| a.0.cmp(&b.0));
    (v["source"].as_str().unwrap_or("demandlib").to_owned(), out)
}

/// A population of `m` meters: meter i follows class i mod K, scaled to a mean
/// power drawn from [0.5, 1.5] kW (4,400–13,100 kWh a year), with a day-to-day
/// factor (lognormal, σ 0.1) and interval noise (lognormal, σ 0.1), clipped to alpha.
pub fn population(
    shapes: &[(String, Vec<f64>)],
    m: usize,
    alpha: f64,
    rng: &mut ChaCha8Rng,
) -> (DMatrix<f64>, Vec<usize>) {
    let n = shapes[0].1.len();
    let day = LogNormal::new(0.0, 0.1).expect("lognormal");
    let noise = LogNormal::new(0.0, 0.1).expect("lognormal");
    let mut x = DMatrix::zeros(m, n);
    let mut class = Vec::with_capacity(m);
    for i in 0..m {
        let c = i % shapes.len();
        class.push(c);
        let mean_kw = rng.random_range(0.5..1.5);
        let mut f = 1.0;
        for j in 0..n {
            if j % 96 == 0 {
                f = day.sample(rng);
            }
            x[(i, j)] = (shapes[c].1[j] * mean_kw * f * noise.sample(rng)).clamp(0.0, alpha);
        }
    }
    (x, class)
}

pub fn quantize(x: &DMatrix<f64>, p: &DitherProfile, missing: f64, rng: &mut ChaCha8Rng) -> LevelMatrix {
    let mut l = LevelMatrix::missing(x.nrows(), x.ncols());
    for j in 0..x.ncols() {
        for i in 0..x.nrows() {
            let level = dither_and_quantize(p, x[(i, j)], rng);
            if !rng.random_bool(missing) {
                l.set(i, j, Some(level));
            }
        }
    }
    l
}

pub fn nrmse(a: &DMatrix<f64>, truth: &DMatrix<f64>) -> f64 {
    (a - truth).norm() / truth.norm()
}

/// nRMSE restricted to the given columns.
pub fn nrmse_cols(a: &DMatrix<f64>, truth: &DMatrix<f64>, cols: &[usize]) -> f64 {
    let (mut num, mut den) = (0.0, 0.0);
    for &j in cols {
        for i in 0..a.nrows() {
            num += (a[(i, j)] - truth[(i, j)]).powi(2);
            den += truth[(i, j)].powi(2);
        }
    }
    (num / den).sqrt()
}

/// Per meter, the mean over days of |E_est - E_true| / E_true; then the median over meters.
pub fn median_daily_energy_error(a: &DMatrix<f64>, truth: &DMatrix<f64>, per_day: usize) -> f64 {
    let days = a.ncols() / per_day;
    let mut per_meter: Vec<f64> = (0..a.nrows())
        .map(|i| {
            (0..days)
                .map(|d| {
                    let (mut e, mut t) = (0.0, 0.0);
                    for j in d * per_day..(d + 1) * per_day {
                        e += a[(i, j)];
                        t += truth[(i, j)];
                    }
                    (e - t).abs() / t.max(1e-9)
                })
                .sum::<f64>()
                / days as f64
        })
        .collect();
    per_meter.sort_by(f64::total_cmp);
    per_meter[per_meter.len() / 2]
}
