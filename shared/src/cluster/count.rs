//! The stability rule for the number of clusters: the merge path clustered
//! afresh on random subsamples, compared by the adjusted Rand index.

use nalgebra::DMatrix;
use rand::SeedableRng;

use super::assignment::{merge, over_segment, Pieces};
use super::ClusterParams;

/// The adjusted Rand index of two labellings of the same items (Hubert and
/// Arabie 1985): 1 for identical partitions, about 0 for chance agreement.
pub fn adjusted_rand(a: &[usize], b: &[usize]) -> f64 {
    let n = a.len();
    if n < 2 {
        return 1.0;
    }
    let (ka, kb) = (a.iter().max().map_or(0, |v| v + 1), b.iter().max().map_or(0, |v| v + 1));
    let mut table = vec![0u64; ka * kb];
    for (x, y) in a.iter().zip(b) {
        table[x * kb + y] += 1;
    }
    let pairs = |v: u64| (v * v.saturating_sub(1)) as f64 / 2.0;
    let index: f64 = table.iter().map(|v| pairs(*v)).sum();
    let rows: f64 = (0..ka).map(|x| pairs(table[x * kb..(x + 1) * kb].iter().sum())).sum();
    let cols: f64 = (0..kb).map(|y| pairs((0..ka).map(|x| table[x * kb + y]).sum())).sum();
    let expected = rows * cols / pairs(n as u64);
    let max = 0.5 * (rows + cols);
    if (max - expected).abs() < 1e-12 {
        1.0
    } else {
        (index - expected) / (max - expected)
    }
}

/// The merge path of an over-segmentation: for each count c in 1..=found
/// (index c), the labels after merging the pieces down to c.
pub(super) fn merge_path(p: &Pieces) -> Vec<Vec<usize>> {
    let mut out = vec![Vec::new(); p.found + 1];
    for (c, slot) in out.iter_mut().enumerate().skip(1) {
        *slot = merge(&p.w, &p.over, p.found, c);
    }
    out
}

/// Each count's stability under resampling: the mean adjusted Rand index
/// between the merge path's partition at that count and the partition of a
/// random 80% of the customers clustered afresh (restricted to them).
pub fn count_stability(profiles: &DMatrix<f64>, params: &ClusterParams, draws: usize) -> Vec<f64> {
    let pieces = params.max_clusters.min(profiles.nrows().saturating_sub(1)).max(2);
    stability_of(profiles, &merge_path(&over_segment(profiles, params, pieces)), params, draws)
}

/// [`count_stability`] for a merge path already computed on `profiles`.
pub(super) fn stability_of(
    profiles: &DMatrix<f64>,
    full: &[Vec<usize>],
    params: &ClusterParams,
    draws: usize,
) -> Vec<f64> {
    let m = profiles.nrows();
    let mut score = vec![0.0; full.len()];
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(params.seed.wrapping_add(1));
    if m * 4 / 5 < 3 {
        return score;
    }
    let pieces = params.max_clusters.min(m - 1).max(2);
    for _ in 0..draws {
        let rows = rand::seq::index::sample(&mut rng, m, m * 4 / 5).into_vec();
        let sample = profiles.select_rows(&rows);
        let sub = merge_path(&over_segment(&sample, params, pieces.min(rows.len() - 1).max(2)));
        for c in 2..full.len().min(sub.len()) {
            let restricted: Vec<usize> = rows.iter().map(|&i| full[c][i]).collect();
            score[c] += adjusted_rand(&restricted, &sub[c]) / draws as f64;
        }
    }
    score
}

/// The largest count whose stability reaches `min`, or else the most stable.
pub fn stable_count(stability: &[f64], min: f64) -> usize {
    let counts = 2..stability.len();
    counts
        .clone()
        .rev()
        .find(|&c| stability[c] >= min)
        .unwrap_or_else(|| counts.max_by(|&a, &b| stability[a].total_cmp(&stability[b])).unwrap_or(2))
}
