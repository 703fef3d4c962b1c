//! How clustering time and memory grow with the population (a benchmark).
//!
//! `cargo bench -p meterveil-shared --bench cluster_scale -- M [M …]` clusters
//! planted populations of M customers × 28 days (12 load shapes with scale, day
//! and interval variation) and prints one JSON line per size: wall seconds,
//! the ratio to the first size, clusters found, purity, and peak resident memory.

use std::time::Instant;

use meterveil_shared::cluster::{cluster, ClusterParams};
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
        let t0 = Instant::now();
        let c = cluster(&x, &ClusterParams { max_clusters: 20, ..Default::default() }).expect("cluster");
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
        println!(
            "{}",
            serde_json::json!({
                "meters": m, "intervals": n, "wall_s": secs, "time_ratio_to_first": secs / base_t,
                "clusters": c.clusters, "purity": tot as f64 / m as f64, "peak_rss_gib": peak_rss_gib(),
            })
        );
    }
}
