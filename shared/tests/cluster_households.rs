//! Clustering where households dominate: two populations at σ 0.3 kW with 3
//! levels, clustered from their stored levels (not from the truth), scored
//! against their true classes by scikit-learn's adjusted_rand_score, with
//! scikit-learn's SpectralClustering(assign_labels="cluster_qr") on the same
//! affinity and KMeans on the same features beside them (version printed;
//! pinned in tests/reference/requirements.txt).

mod common;

use common::*;
use meterveil_shared::cluster::{affinity_graph, cluster, features, representation, ClusterParams};
use meterveil_shared::recovery::outage::DayLayout;
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, LogNormal, Poisson};

/// A smooth bump over the day, for a meter's own habit: 1 + a·exp(-(h-h0)²/2w²)
/// (h wraps around midnight).
fn bump(h: f64, h0: f64, width: f64, a: f64) -> f64 {
    let d = (h - h0 + 36.0).rem_euclid(24.0) - 12.0;
    1.0 + a * (-(d * d) / (2.0 * width * width)).exp()
}

/// 60% households on the BDEW H0 shape, each with its own mean power, habit,
/// day-to-day factor, interval noise and 1-3 kW appliance spikes; the other ten
/// BDEW classes share the rest equally, each meter with its own scale, a small
/// shape of its own and day and interval variation. Returns kW and true classes.
pub fn households_dominating(
    shapes: &[(String, Vec<f64>)],
    m: usize,
    rng: &mut ChaCha8Rng,
) -> (DMatrix<f64>, Vec<usize>) {
    let n = shapes[0].1.len();
    let h0 = shapes.iter().position(|s| s.0 == "H0").expect("H0");
    let others: Vec<usize> = (0..shapes.len()).filter(|&c| c != h0).collect();
    let households = m * 3 / 5;
    let mut x = DMatrix::zeros(m, n);
    let mut class = Vec::with_capacity(m);
    let spikes = Poisson::new(2.0).expect("poisson");
    for i in 0..m {
        let household = i < households;
        let c = if household { h0 } else { others[(i - households) % others.len()] };
        class.push(c);
        let (mean_kw, day_sd, noise_sd, habit_a) = if household {
            (LogNormal::new((0.45f64).ln(), 0.35).unwrap().sample(rng), 0.15, 0.15, rng.random_range(-0.3..0.5))
        } else {
            (rng.random_range(0.5..3.0), 0.1, 0.1, rng.random_range(-0.1..0.1))
        };
        let (hh, hw) = (rng.random_range(0.0..24.0), rng.random_range(1.0..3.0));
        let day = LogNormal::new(0.0, day_sd).unwrap();
        let noise = LogNormal::new(0.0, noise_sd).unwrap();
        let mut f = 1.0;
        for j in 0..n {
            if j % 96 == 0 {
                f = day.sample(rng);
            }
            let h = (j % 96) as f64 / 4.0;
            x[(i, j)] = shapes[c].1[j] * mean_kw * f * bump(h, hh, hw, habit_a) * noise.sample(rng);
        }
        if household {
            for d in 0..n / 96 {
                let count = spikes.sample(rng) as usize;
                for _ in 0..count {
                    let (kw, len) = (rng.random_range(1.0..3.0), rng.random_range(1..=4));
                    let start = d * 96 + rng.random_range(24..92);
                    for j in start..(start + len).min(n) {
                        x[(i, j)] += kw;
                    }
                }
            }
        }
    }
    (x, class)
}

struct Figures {
    clusters: usize,
    auto: f64,
    fixed: f64,
    spectral_qr: f64,
    kmeans: f64,
    unassigned: f64,
}

/// Dithers and quantizes `truth` (σ 0.3 kW, 3 levels, 2% of readings missing),
/// fits the clustering representation from the levels alone, clusters it with
/// the automatic and the true count, and scores both with scikit-learn beside
/// scikit-learn's own spectral clustering (cluster_qr) on the same affinity and
/// KMeans on the same features.
fn run(name: &str, truth: &DMatrix<f64>, class: &[usize], k: usize) -> Figures {
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    let p = gaussian_profile(0.3, &[1.0, 2.0]);
    let levels = quantize(truth, &p, 0.02, &mut rng);
    let layout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };
    let (x, _) = representation(&levels, &p, &[], layout, 15.0, &mut |_, _| {}).unwrap();
    let params = ClusterParams::default();
    let auto = cluster(&x, &params).unwrap();
    let fixed = cluster(&x, &ClusterParams { clusters: Some(k), ..params.clone() }).unwrap();
    let feats = features(&x, params.dimension, params.seed);
    let w = affinity_graph(&x, &params);
    let s = clustering_scores(class, &[("auto", &auto.labels), ("fixed", &fixed.labels)], &feats, Some(&w), k);
    let f = |n: &str| s["ari"][n].as_f64().unwrap();
    let unassigned = auto.assigned.iter().filter(|a| !**a).count() as f64 / x.nrows() as f64;
    eprintln!(
        "{name}, {} meters, {k} classes, sklearn {}: automatic count {} (ARI {:.3}), true count ARI {:.3}; sklearn SpectralClustering(cluster_qr) on the same affinity {:.3}, KMeans on the same features {:.3}; unassigned {:.1}%; coherence {:?}",
        x.nrows(), s["sklearn"], auto.clusters, f("auto"), f("fixed"), f("sklearn_spectral_qr"), f("sklearn_kmeans"), 100.0 * unassigned,
        auto.coherence.iter().map(|v| (v * 100.0).round() / 100.0).collect::<Vec<_>>()
    );
    Figures {
        clusters: auto.clusters,
        auto: f("auto"),
        fixed: f("fixed"),
        spectral_qr: f("sklearn_spectral_qr"),
        kmeans: f("sklearn_kmeans"),
        unassigned,
    }
}

/// Households dominating, generated here on the BDEW shapes (demandlib).
#[test]
fn classes_separate_where_households_dominate() {
    let (_, shapes) = bdew_shapes(28);
    let mut rng = ChaCha8Rng::seed_from_u64(50);
    let (x, class) = households_dominating(&shapes, 1400, &mut rng);
    let f = run("households dominating (BDEW shapes, 60% H0 households with spikes)", &x, &class, shapes.len());
    assert!((f.auto - 0.93).abs() < 0.03, "ARI automatic count {}", f.auto);
    assert!((f.fixed - 0.93).abs() < 0.03, "ARI true count {}", f.fixed);
    assert!((f.clusters as i64 - 11).abs() <= 1, "count {}", f.clusters);
    // k-means on the same features cuts the households (sklearn's KMeans).
    assert!(f.kmeans < 0.5, "sklearn KMeans {}", f.kmeans);
    assert!(f.spectral_qr > 0.85, "sklearn spectral {}", f.spectral_qr);
    assert!(f.unassigned < 0.05, "unassigned {}", f.unassigned);
}

/// The mixed feeder of tests/reference/populations.py: CREST households (60%)
/// and the BDEW commercial and agricultural classes G0-G6, L0-L2.
#[test]
fn classes_separate_on_the_mixed_feeder() {
    let mixed = ReferencePopulation::load("mixed", 1, 500, 28);
    let (names, class) = mixed.class_indices();
    let f = run("mixed feeder (CREST households and BDEW classes)", &mixed.x, &class, names.len());
    assert!((f.auto - 0.975).abs() < 0.03, "ARI automatic count {}", f.auto);
    assert!((f.clusters as i64 - 11).abs() <= 1, "count {}", f.clusters);
    assert!((f.fixed - 0.975).abs() < 0.03, "ARI true count {}", f.fixed);
    // sklearn's own assignment on our affinity splits the CREST households.
    assert!(f.spectral_qr < 0.7, "sklearn spectral {}", f.spectral_qr);
    assert!(f.kmeans < 0.5, "sklearn KMeans {}", f.kmeans);
    assert!(f.unassigned < 0.1, "unassigned {}", f.unassigned);
}
