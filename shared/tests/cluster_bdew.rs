//! Load-shape clustering on BDEW test populations (package demandlib), scored by
//! scikit-learn's adjusted_rand_score (version printed; pinned in
//! tests/reference/requirements.txt), with scikit-learn's KMeans as a baseline.

mod common;

use std::io::Write;
use std::process::{Command, Stdio};

use common::*;
use meterveil_shared::cluster::{cluster, features, ClusterParams};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, RankChoice, RecoveryParams};
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde_json::{json, Value};

fn scores(truth: &[usize], labels: &[(&str, &[usize])], feats: &DMatrix<f64>, k: usize) -> Value {
    let python = std::env::var("METERVEIL_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/clustering_scores.py");
    let rows: Vec<Vec<f64>> = feats.row_iter().map(|r| r.iter().copied().collect()).collect();
    let body = json!({
        "truth": truth,
        "labels": labels.iter().map(|(n, l)| (n.to_string(), json!(l))).collect::<serde_json::Map<_, _>>(),
        "features": rows, "k": k,
    });
    let mut child =
        Command::new(&python).arg(script).stdin(Stdio::piped()).stdout(Stdio::piped()).spawn().expect("python");
    child.stdin.take().expect("stdin").write_all(body.to_string().as_bytes()).expect("write");
    let out = child.wait_with_output().expect("scores");
    assert!(out.status.success(), "clustering_scores.py failed");
    serde_json::from_slice(&out.stdout).expect("json")
}

#[test]
fn bdew_classes_are_found_in_true_and_recovered_profiles() {
    let (source, shapes) = bdew_shapes(28);
    let mut rng = ChaCha8Rng::seed_from_u64(40);
    let (truth, class) = population(&shapes, 1400, 15.0, &mut rng);
    let params = ClusterParams::default();
    let auto = cluster(&truth, &params).unwrap();
    let fixed = cluster(&truth, &ClusterParams { clusters: Some(shapes.len()), ..params.clone() }).unwrap();
    let feats = features(&truth, params.dimension, params.seed);
    let s = scores(&class, &[("auto", &auto.labels), ("fixed", &fixed.labels)], &feats, shapes.len());
    eprintln!("{source}; sklearn {}: true profiles: automatic count {} (of {}), ARI auto {:.3}, ARI with {} clusters {:.3}, sklearn KMeans on the same features {:.3}; eigenvalues {:?}",
        s["sklearn"], auto.clusters, shapes.len(), s["ari"]["auto"], shapes.len(), s["ari"]["fixed"], s["ari"]["sklearn_kmeans"], &auto.eigenvalues[..auto.eigenvalues.len().min(14)]);

    let p = gaussian_profile(0.3, &[1.0, 2.0]);
    let levels = quantize(&truth, &p, 0.05, &mut rng);
    let rp = RecoveryParams { rank: RankChoice::Fixed(20), alpha_kw: 15.0, ..Default::default() }.check().unwrap();
    let rec =
        recover(&levels, &p, &[], DayLayout { window_start: 1_673_222_400, interval_s: 900 }, &rp, &mut |_, _| {})
            .unwrap();
    let on_rec = cluster(&rec.x, &ClusterParams { clusters: Some(shapes.len()), ..params.clone() }).unwrap();
    let rfeats = features(&rec.x, params.dimension, params.seed);
    let r = scores(&class, &[("recovered", &on_rec.labels)], &rfeats, shapes.len());
    eprintln!(
        "recovered profiles: ARI {:.3}, sklearn KMeans on the same features {:.3}",
        r["ari"]["recovered"], r["ari"]["sklearn_kmeans"]
    );

    assert!((auto.clusters as i64 - shapes.len() as i64).abs() <= 2, "automatic count {}", auto.clusters);
    assert!(s["ari"]["fixed"].as_f64().unwrap() >= 0.85);
    assert!(r["ari"]["recovered"].as_f64().unwrap() >= 0.55);
}
