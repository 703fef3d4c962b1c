//! Helpers shared by the integration tests: running the Python reference scripts,
//! building test populations and scoring recoveries.
#![allow(dead_code)]

pub mod aggregates;

use std::process::Command;

use meterveil_shared::audit::InjectedEvent;
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
        register_period: None,
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

/// Scores labellings against true classes with scikit-learn
/// (tests/reference/clustering_scores.py): the adjusted Rand index of each, of
/// scikit-learn's KMeans on `feats`, and (given an affinity as adjacency lists)
/// of scikit-learn's SpectralClustering(assign_labels="cluster_qr") on it.
pub fn clustering_scores(
    truth: &[usize],
    labels: &[(&str, &[usize])],
    feats: &DMatrix<f64>,
    affinity: Option<&[Vec<(usize, f64)>]>,
    k: usize,
) -> Value {
    use std::io::Write;
    use std::process::Stdio;
    let python = std::env::var("METERVEIL_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = format!("{}/../tests/reference/clustering_scores.py", env!("CARGO_MANIFEST_DIR"));
    let rows: Vec<Vec<f64>> = feats.row_iter().map(|r| r.iter().copied().collect()).collect();
    let edges: Vec<(usize, usize, f64)> =
        affinity.unwrap_or(&[]).iter().enumerate().flat_map(|(i, r)| r.iter().map(move |&(j, v)| (i, j, v))).collect();
    let body = serde_json::json!({
        "truth": truth,
        "labels": labels.iter().map(|(n, l)| (n.to_string(), serde_json::json!(l))).collect::<serde_json::Map<_, _>>(),
        "features": rows, "k": k, "affinity": edges,
    });
    let mut child =
        Command::new(&python).arg(script).stdin(Stdio::piped()).stdout(Stdio::piped()).spawn().expect("python");
    child.stdin.take().expect("stdin").write_all(body.to_string().as_bytes()).expect("write");
    let out = child.wait_with_output().expect("scores");
    assert!(out.status.success(), "clustering_scores.py failed");
    serde_json::from_slice(&out.stdout).expect("json")
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
    energy_errors(a, truth, &(0..a.nrows()).collect::<Vec<_>>(), per_day).daily_median
}

/// A test population written by `tests/reference/populations.py` (cached under
/// `target/reference-data/`): 15-minute kW per meter and the generator's metadata.
pub struct ReferencePopulation {
    /// (meters, intervals), kW.
    pub x: DMatrix<f64>,
    pub meta: Value,
}

impl ReferencePopulation {
    /// `kind` is `crest`, `mixed` or `uci`; see the script's docstring.
    pub fn load(kind: &str, seed: u64, meters: usize, days: usize) -> Self {
        let target =
            std::env::var("CARGO_TARGET_DIR").unwrap_or_else(|_| format!("{}/../target", env!("CARGO_MANIFEST_DIR")));
        let cache = format!("{target}/reference-data");
        let out = python_json(
            "populations.py",
            &[
                kind,
                "--seed",
                &seed.to_string(),
                "--meters",
                &meters.to_string(),
                "--days",
                &days.to_string(),
                "--cache",
                &cache,
            ],
        );
        let dir = out["dir"].as_str().expect("dir").to_owned();
        let meta: Value = serde_json::from_slice(&std::fs::read(format!("{dir}/meta.json")).expect("meta.json"))
            .expect("meta.json is JSON");
        let bytes = std::fs::read(format!("{dir}/kw.f64")).expect("kw.f64");
        let (m, n) = (meta["meters_count"].as_u64().unwrap() as usize, meta["intervals"].as_u64().unwrap() as usize);
        assert_eq!(bytes.len(), m * n * 8, "kw.f64 holds {m} x {n} doubles");
        let vals: Vec<f64> = bytes.chunks_exact(8).map(|c| f64::from_le_bytes(c.try_into().unwrap())).collect();
        Self { x: DMatrix::from_row_slice(m, n, &vals), meta }
    }

    pub fn meters(&self) -> &Vec<Value> {
        self.meta["meters"].as_array().expect("meters")
    }

    /// Row indices of meters whose `source` is `source` (CREST, BDEW, UCI).
    pub fn rows_from(&self, source: &str) -> Vec<usize> {
        self.meters().iter().enumerate().filter(|(_, m)| m["source"] == source).map(|(i, _)| i).collect()
    }

    /// The true class of every meter, as an index into the sorted class names.
    pub fn class_indices(&self) -> (Vec<String>, Vec<usize>) {
        let mut names: Vec<String> = self.meters().iter().map(|m| m["class"].as_str().unwrap().to_owned()).collect();
        let labels = names.clone();
        names.sort();
        names.dedup();
        let idx = labels.iter().map(|l| names.binary_search(l).unwrap()).collect();
        (names, idx)
    }
}

/// The p-quantile (nearest rank) of `v`.
pub fn quantile(v: &[f64], p: f64) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[((s.len() - 1) as f64 * p).round() as usize]
}

/// Energy errors of an estimate on the given rows, relative to the truth.
#[derive(Debug, Clone, Copy)]
pub struct EnergyErrors {
    /// Per meter, mean over days of |E_est − E_true| / E_true: median and 90th percentile over meters.
    pub daily_median: f64,
    pub daily_p90: f64,
    /// Per meter, |window energy error| / window energy: median and 90th percentile over meters.
    pub window_median: f64,
    pub window_p90: f64,
    /// Median over meters of the signed window energy error (E_est − E_true) / E_true.
    pub window_bias: f64,
}

pub fn energy_errors(a: &DMatrix<f64>, truth: &DMatrix<f64>, rows: &[usize], per_day: usize) -> EnergyErrors {
    let days = a.ncols() / per_day;
    let mut daily = Vec::with_capacity(rows.len());
    let mut window = Vec::with_capacity(rows.len());
    let mut signed = Vec::with_capacity(rows.len());
    for &i in rows {
        let (mut we, mut wt, mut sum_rel) = (0.0, 0.0, 0.0);
        for d in 0..days {
            let (mut e, mut t) = (0.0, 0.0);
            for j in d * per_day..(d + 1) * per_day {
                e += a[(i, j)];
                t += truth[(i, j)];
            }
            sum_rel += (e - t).abs() / t.max(1e-9);
            we += e;
            wt += t;
        }
        daily.push(sum_rel / days as f64);
        window.push((we - wt).abs() / wt.max(1e-9));
        signed.push((we - wt) / wt.max(1e-9));
    }
    EnergyErrors {
        daily_median: quantile(&daily, 0.5),
        daily_p90: quantile(&daily, 0.9),
        window_median: quantile(&window, 0.5),
        window_p90: quantile(&window, 0.9),
        window_bias: quantile(&signed, 0.5),
    }
}

/// nRMSE over the given rows.
pub fn nrmse_rows(a: &DMatrix<f64>, truth: &DMatrix<f64>, rows: &[usize]) -> f64 {
    let (mut num, mut den) = (0.0, 0.0);
    for j in 0..a.ncols() {
        for &i in rows {
            num += (a[(i, j)] - truth[(i, j)]).powi(2);
            den += truth[(i, j)].powi(2);
        }
    }
    (num / den).sqrt()
}

/// Appliance classes of the CREST events, in the order their index is used.
pub const APPLIANCE_CLASSES: [&str; 6] =
    ["kettle", "cooking", "washing and drying", "dishwasher", "water heating", "other"];

/// The CREST switch-on events of meter `row` whose 15-minute mean power exceeds
/// `min_kw` (the event's mean power times the share of the interval it fills,
/// at most the whole interval), as interval events of row 0 with `kind` the
/// index of its class in [`APPLIANCE_CLASSES`] (the generator's
/// `appliance_classes` map; any other appliance is "other").
pub fn crest_events(pop: &ReferencePopulation, row: usize, min_kw: f64) -> Vec<InjectedEvent> {
    let classes = &pop.meta["appliance_classes"];
    let interval_min = pop.meta["interval_s"].as_f64().expect("interval_s") / 60.0;
    pop.meta["events"]
        .as_array()
        .expect("events")
        .iter()
        .filter(|e| e[0].as_u64() == Some(row as u64))
        .filter_map(|e| {
            let (s, t, kw) = (e[1].as_f64()?, e[2].as_f64()?, e[4].as_f64()?);
            let class = classes[e[3].as_str()?].as_str().unwrap_or("other");
            let kind = APPLIANCE_CLASSES.iter().position(|c| *c == class).unwrap_or(5);
            let mean15 = kw * ((t - s) / interval_min).min(1.0);
            let start = (s / interval_min) as usize;
            let end = ((t / interval_min).ceil() as usize).max(start + 1);
            (mean15 > min_kw).then_some(InjectedEvent { row: 0, start, len: end - start, kw, kind })
        })
        .collect()
}
