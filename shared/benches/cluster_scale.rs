//! How clustering time and memory grow with the population (a benchmark).
//!
//! `cargo bench -p meterveil-shared --bench cluster_scale -- M [M …]` clusters
//! planted populations of M customers × 28 days (12 load shapes with scale, day
//! and interval variation) from their levels (σ 0.3 kW, 3 levels), as a
//! clustering job does: the fit at the clustering rank, then the clustering.
//! One JSON line per size: the seconds of each step and in all, the ratio to
//! the first size, clusters found, purity, peak resident memory, and whether the
//! target (20,000 meters in at most 120 s and 4 GiB on 2 cores) holds.

use std::time::Instant;

use meterveil_shared::cluster::{cluster, representation, ClusterParams};
use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::LevelMatrix;
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, LogNormal};

fn peak_rss_gib() -> Option<f64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    let kb: f64 = s.lines().find(|l| l.starts_with("VmHWM:"))?.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0 / 1024.0)
}

fn main() {
    let sizes: Vec<usize> = std::env::args().skip(1).filter_map(|a| a.parse().ok()).collect();
    let sizes = if sizes.is_empty() { vec![2000, 20000] } else { sizes };
    let n = 28 * 96;
    let shapes = 12;
    let mut first = None;
    for m in sizes {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(m as u64);
        let noise = LogNormal::new(0.0, 0.1).expect("lognormal");
        let base: Vec<Vec<f64>> = (0..shapes)
            .map(|k| {
                let (p1, p2) = (rng.random_range(0.0..24.0), rng.random_range(0.0..24.0));
                (0..96)
                    .map(|t| {
                        let h = t as f64 / 4.0;
                        0.3 + (-(h - p1).powi(2) / (1.0 + k as f64 % 3.0)).exp() + 0.6 * (-(h - p2).powi(2) / 4.0).exp()
                    })
                    .collect()
            })
            .collect();
        let x = DMatrix::from_fn(m, n, |i, j| {
            base[i % shapes][j % 96] * (0.5 + (i % 11) as f64 * 0.1) * noise.sample(&mut rng)
        });
        let profile = DitherProfile::try_from(DitherProfileSpec {
            noise: "gaussian".into(),
            scale_kw: 0.3,
            boundaries_kw: vec![1.0, 2.0],
            interval_s: 900,
            send_registers: false,
            register_period: None,
        })
        .expect("profile");
        let mut levels = LevelMatrix::missing(m, n);
        for j in 0..n {
            for i in 0..m {
                levels.set(i, j, Some(dither_and_quantize(&profile, x[(i, j)], &mut rng)));
            }
        }
        drop(x);
        let layout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };
        let t0 = Instant::now();
        let (z, _) = representation(&levels, &profile, &[], layout, 15.0, &mut |_, _| {}).expect("fit");
        let fit_s = t0.elapsed().as_secs_f64();
        drop(levels);
        let t1 = Instant::now();
        let c = cluster(&z, &ClusterParams::default()).expect("cluster");
        let cluster_s = t1.elapsed().as_secs_f64();
        let secs = t0.elapsed().as_secs_f64();
        let base_t = *first.get_or_insert(secs);
        let mut tot = 0;
        for k in 0..c.clusters {
            let mut cnt = vec![0usize; shapes];
            for (i, &l) in c.labels.iter().enumerate() {
                if l == k {
                    cnt[i % shapes] += 1;
                }
            }
            tot += cnt.iter().max().copied().unwrap_or(0);
        }
        let rss = peak_rss_gib();
        println!(
            "{}",
            serde_json::json!({
                "meters": m, "intervals": n, "fit_s": fit_s, "cluster_s": cluster_s, "wall_s": secs,
                "time_ratio_to_first": secs / base_t, "clusters": c.clusters, "purity": tot as f64 / m as f64,
                "peak_rss_gib": rss,
                "target_holds": if m == 20_000 {
                    serde_json::json!(secs <= 120.0 && rss.is_some_and(|r| r <= 4.0))
                } else {
                    serde_json::Value::Null
                },
            })
        );
    }
}
