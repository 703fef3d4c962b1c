//! From the spectral embedding to clusters: the QR-based discretisation into
//! pieces, the merging of pieces by normalised cut, and the coherence and
//! confidence figures read off the affinity.

use nalgebra::DMatrix;

use super::{affinity_graph, leading_eigen, ClusterParams};

/// A population's affinity, its leading eigenvalues and its over-segmentation.
pub(super) struct Pieces {
    pub w: Vec<Vec<(usize, f64)>>,
    /// Leading eigenvalues of the normalised affinity, largest first.
    pub vals: Vec<f64>,
    pub eigen: super::EigenSolve,
    /// Piece of each customer, and the number of pieces found.
    pub over: Vec<usize>,
    pub found: usize,
}

/// Cuts the spectral embedding of `profiles` into at most `pieces` pieces.
pub(super) fn over_segment(profiles: &DMatrix<f64>, params: &ClusterParams, pieces: usize) -> Pieces {
    let w = affinity_graph(profiles, params);
    let (vals, vecs, eigen) = leading_eigen(&w, pieces + 1, params.seed, params.dense_limit);
    let (over, found) = assign(&vecs, pieces);
    Pieces { w, vals, eigen, over, found }
}

/// Labels from the leading `k` eigenvectors (rows of `emb`) by the QR-based
/// discretisation of Damle, Minden and Ying (2019): a column-pivoted QR of embᵀ
/// picks k well-spread meters; the orthogonal factor of their k × k block
/// rotates the embedding so each axis points at one cluster; each meter goes to
/// its largest |coordinate|. Unlike k-means it does not prefer equal-sized
/// clusters, so a dominant class is not cut into pieces to balance them.
pub fn qr_assign(emb: &DMatrix<f64>) -> Vec<usize> {
    let (m, k) = emb.shape();
    if k <= 1 || m == 0 {
        return vec![0; m];
    }
    let qr = emb.transpose().col_piv_qr();
    let mut order = DMatrix::<f64>::from_fn(1, m, |_, c| c as f64);
    qr.p().permute_columns(&mut order);
    let piv: Vec<usize> = (0..k.min(m)).map(|c| order[(0, c)] as usize).collect();
    let block = DMatrix::from_fn(k, piv.len(), |r, c| emb[(piv[c], r)]); // (k, k): columns are the pivots' rows
    let svd = block.svd(true, true);
    let (Some(u), Some(vt)) = (svd.u, svd.v_t) else {
        return vec![0; m];
    };
    let rot = u * vt;
    let coords = emb * rot;
    coords.row_iter().map(|r| (0..k).max_by(|&a, &b| r[a].abs().total_cmp(&r[b].abs())).unwrap_or(0)).collect()
}

/// Each cluster's coherence: the share of its members' affinity that stays
/// inside it, w(C, C) / vol(C), in [0, 1] (one minus its normalised cut).
pub fn coherence(w: &[Vec<(usize, f64)>], labels: &[usize], k: usize) -> Vec<f64> {
    let (mut inside, mut vol) = (vec![0.0; k], vec![0.0; k]);
    for (i, row) in w.iter().enumerate() {
        for &(j, v) in row {
            vol[labels[i]] += v;
            if labels[j] == labels[i] {
                inside[labels[i]] += v;
            }
        }
    }
    inside.iter().zip(&vol).map(|(a, b)| if *b > 0.0 { a / b } else { 0.0 }).collect()
}

/// Each meter's share of its own affinity that goes to its cluster, in [0, 1].
pub(super) fn own_share(w: &[Vec<(usize, f64)>], labels: &[usize]) -> Vec<f64> {
    w.iter()
        .enumerate()
        .map(|(i, row)| {
            let total: f64 = row.iter().map(|e| e.1).sum();
            let inside: f64 = row.iter().filter(|e| labels[e.0] == labels[i]).map(|e| e.1).sum();
            if total > 0.0 {
                inside / total
            } else {
                0.0
            }
        })
        .collect()
}

/// Labels of the rows of the leading `k` columns of `vecs`, renumbered so that
/// empty clusters are dropped.
pub(super) fn assign(vecs: &DMatrix<f64>, k: usize) -> (Vec<usize>, usize) {
    let k = k.min(vecs.ncols()).max(1);
    let emb = vecs.columns(0, k).clone_owned();
    let raw = qr_assign(&emb);
    let mut map = vec![usize::MAX; k];
    let mut next = 0;
    let labels = raw
        .iter()
        .map(|&l| {
            if map[l] == usize::MAX {
                map[l] = next;
                next += 1;
            }
            map[l]
        })
        .collect();
    (labels, next)
}

/// Merges the `k` clusters of `labels` pairwise down to `target`, each time
/// the pair whose union lowers the normalised cut most: Σ (1 - coherence)
/// falls by 1 - coh(A) - coh(B) + coh(A ∪ B). The pieces of one class send
/// most of their affinity to each other and merge first; classes that keep
/// theirs merge last. Returns dense 0-based labels.
pub fn merge(w: &[Vec<(usize, f64)>], labels: &[usize], k: usize, target: usize) -> Vec<usize> {
    // Inter-cluster affinity and volumes.
    let mut between = DMatrix::<f64>::zeros(k, k);
    for (i, row) in w.iter().enumerate() {
        for &(j, v) in row {
            between[(labels[i], labels[j])] += v;
        }
    }
    let mut vol: Vec<f64> = (0..k).map(|a| between.row(a).sum()).collect();
    let mut alive: Vec<bool> = vec![true; k];
    let mut parent: Vec<usize> = (0..k).collect();
    let mut count = k;
    while count > target.max(1) {
        let coh = |inside: f64, v: f64| if v > 0.0 { inside / v } else { 1.0 };
        let mut best: Option<(f64, usize, usize)> = None;
        for a in 0..k {
            for b in a + 1..k {
                if !(alive[a] && alive[b]) {
                    continue;
                }
                let union = coh(between[(a, a)] + between[(b, b)] + 2.0 * between[(a, b)], vol[a] + vol[b]);
                let decrease = 1.0 - coh(between[(a, a)], vol[a]) - coh(between[(b, b)], vol[b]) + union;
                if best.is_none_or(|x| decrease > x.0) {
                    best = Some((decrease, a, b));
                }
            }
        }
        let Some((_, a, b)) = best else { break };
        // b joins a.
        let inside = between[(b, b)] + 2.0 * between[(a, b)];
        for c in (0..k).filter(|&c| c != a && c != b) {
            let v = between[(b, c)];
            between[(a, c)] += v;
            between[(c, a)] += v;
        }
        between[(a, a)] += inside;
        vol[a] += vol[b];
        alive[b] = false;
        parent[b] = a;
        count -= 1;
    }
    let root = |mut c: usize| {
        while parent[c] != c {
            c = parent[c];
        }
        c
    };
    let mut map = vec![usize::MAX; k];
    let mut next = 0;
    let out = labels
        .iter()
        .map(|&l| {
            let r = root(l);
            if map[r] == usize::MAX {
                map[r] = next;
                next += 1;
            }
            map[r]
        })
        .collect();
    out
}
