//! Load-shape clustering: sparse self-expressive subspace clustering (a
//! candidate-restricted elastic-net variant, after Elhamifar and Vidal 2013 and
//! You et al. 2016), a spectral embedding of the sparse affinity |C| + |C|ᵀ,
//! an over-segmentation by QR-based discretisation (Damle, Minden and Ying
//! 2019), and merging of the pieces by normalised cut.
//!
//! Each customer's profile is reduced to its rank-d factor row (the population's
//! principal coordinates), normalised to unit length, and written as a sparse
//! combination of at most `neighbors` other customers. Customers of one load
//! shape lie near one subspace, so their combinations use each other. The
//! affinity has at most 2·neighbors entries per customer: memory grows linearly
//! with the population, never as m².
//!
//! Why over-segment and merge: when one class holds most customers (households
//! on a residential feeder), any partition into the true count by k-means or by
//! discretisation alone cuts the big class into pieces and merges small classes
//! to balance them. The pieces of a big class send most of their affinity to
//! each other; small classes keep theirs. Merging the pair that lowers the
//! normalised cut most therefore joins the pieces first. Without an operator's
//! count, merging continues while some cluster keeps less than `min_coherence`
//! of its affinity inside itself.
//!
//! Profiles for clustering need a higher rank than profiles for settlement:
//! below the number of classes the classes are gone. [`representation`] fits
//! the levels at [`CLUSTER_RANK`] for that purpose.

use nalgebra::{DMatrix, DVector, SymmetricEigen};
use rand::{Rng, SeedableRng};
use rayon::prelude::*;

use crate::error::FieldError;
use crate::recovery::linalg::truncate;
use crate::recovery::outage::DayLayout;
use crate::recovery::{recover, LevelMatrix, ProgressFn, RankChoice, RecoveryParams, SumConstraint};
use crate::DitherProfile;

/// Rank of the fit made for clustering: 2-3× the number of load-shape classes
/// one expects on a feeder (10-15). Ranks 20, 30 and 40 separated the classes
/// equally well in our measurements; rank 10, the profile fit's usual choice,
/// lost them (adjusted Rand index 0.33 on a 1,400-meter feeder of 11 classes).
pub const CLUSTER_RANK: usize = 30;

/// Iterations of that fit. Clustering needs its subspace, which settles long
/// before the fit converges (the automatic rank search stops at 60 too).
pub const CLUSTER_FIT_ITERATIONS: usize = 60;

/// Profiles for clustering: the maximum-likelihood fit of `levels` at
/// [`CLUSTER_RANK`], whatever rank the settlement profiles use.
pub fn representation(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    layout: DayLayout,
    alpha_kw: f64,
    progress: ProgressFn<'_>,
) -> Result<DMatrix<f64>, FieldError> {
    let params = RecoveryParams {
        rank: RankChoice::Fixed(CLUSTER_RANK),
        alpha_kw,
        max_iterations: CLUSTER_FIT_ITERATIONS,
        ..Default::default()
    }
    .check()?;
    Ok(recover(levels, profile, constraints, layout, &params, progress)?.x)
}

#[derive(Debug, Clone, PartialEq)]
pub struct ClusterParams {
    /// Number of clusters, or `None` for the coherence rule. Default `None`.
    pub clusters: Option<usize>,
    /// Pieces of the over-segmentation (and the largest automatic count).
    /// Default 20.
    pub max_clusters: usize,
    /// Dimension of the factor rows clustered. Default 30 (2-3× the expected
    /// number of load-shape classes worked best in our measurements).
    pub dimension: usize,
    /// Most neighbours per customer in its self-expression. Default 10.
    pub neighbors: usize,
    /// Ridge weight of the self-expression (rows have norm 1). Default 0.05.
    pub ridge: f64,
    /// ℓ1 weight of the self-expression; 0 leaves a ridge solve. Default 0.01.
    pub l1: f64,
    /// Candidates considered per customer (its most correlated rows). Default
    /// 50: 30 left the households of a CREST-based feeder in pieces (ARI 0.64 at
    /// the true count), 100 and 300 cut the noisy mixed-use arcs (0.73-0.88);
    /// 50 held on all four test populations (`shared/tests/cluster_*.rs`).
    pub candidates: usize,
    /// The coherence rule: without an operator's count, pieces are merged while
    /// some cluster keeps less than this share of its affinity inside. Default
    /// 0.7 (0.5 left households in pieces, 0.8 merged distinct commercial
    /// classes; measured on the test populations).
    pub min_coherence: f64,
    /// A meter whose own cluster receives less than this share of its affinity
    /// is reported unassigned. Default 0.5 (most of its neighbours elsewhere).
    pub min_confidence: f64,
    /// Above this many customers the coherence rule counts on a random sample
    /// of this size, and the whole population is then merged to that count.
    /// The pieces of a large class are more coherent the more members it has
    /// (a local neighbour graph has a shorter boundary per member), so the
    /// rule's threshold holds only at the sizes it was measured at: on 20,000
    /// planted meters of 12 shapes it kept 20 clusters, on 2,000 it found 12.
    /// Default 2000 (classes under 0.2% of the customers may go uncounted).
    pub count_sample: usize,
    /// Seed of the randomized SVD, the subspace iteration's start and the
    /// count's sample. Default 3.
    pub seed: u64,
    /// Populations up to this size take a dense eigendecomposition of the
    /// m × m affinity; larger ones an iterative solver on the sparse affinity.
    /// Default 1000 (the dense path is O(m³): 2,000 meters took 17.5 s where
    /// the sparse path took under 2 s).
    pub dense_limit: usize,
}

impl Default for ClusterParams {
    fn default() -> Self {
        Self {
            clusters: None,
            max_clusters: 20,
            dimension: 30,
            neighbors: 10,
            ridge: 0.05,
            l1: 0.01,
            candidates: 50,
            min_coherence: 0.7,
            min_confidence: 0.5,
            count_sample: 2000,
            seed: 3,
            dense_limit: 1000,
        }
    }
}

impl ClusterParams {
    pub fn check(&self) -> Result<(), FieldError> {
        if self.clusters == Some(0) || self.clusters == Some(1) {
            return Err(FieldError::new("clusters", "must be at least 2"));
        }
        if !(2..=200).contains(&self.max_clusters) {
            return Err(FieldError::new("max_clusters", "must be between 2 and 200"));
        }
        if !(1..=500).contains(&self.dimension) {
            return Err(FieldError::new("dimension", "must be between 1 and 500"));
        }
        if !(1..=100).contains(&self.neighbors) {
            return Err(FieldError::new("neighbors", "must be between 1 and 100"));
        }
        if !(self.ridge > 0.0 && self.ridge <= 100.0) {
            return Err(FieldError::new("ridge", "must be in (0, 100]"));
        }
        if !(self.l1 >= 0.0 && self.l1 <= 1.0) {
            return Err(FieldError::new("l1", "must be in [0, 1]"));
        }
        if !(1..=1000).contains(&self.candidates) {
            return Err(FieldError::new("candidates", "must be between 1 and 1000"));
        }
        if !(self.min_coherence > 0.0 && self.min_coherence < 1.0) {
            return Err(FieldError::new("min_coherence", "must be in (0, 1)"));
        }
        if !(0.0..1.0).contains(&self.min_confidence) {
            return Err(FieldError::new("min_confidence", "must be in [0, 1)"));
        }
        if !(100..=20_000).contains(&self.count_sample) {
            return Err(FieldError::new("count_sample", "must be between 100 and 20000"));
        }
        if self.dense_limit > 5000 {
            return Err(FieldError::new(
                "dense_limit",
                "must be at most 5000 (a dense m × m matrix beyond is too large)",
            ));
        }
        Ok(())
    }
}

/// How the count was chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CountChoice {
    Operator,
    Coherence,
}

impl CountChoice {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Operator => "operator",
            Self::Coherence => "coherence",
        }
    }
}

#[derive(Debug, Clone)]
pub struct Clustering {
    /// Nearest cluster of each customer, 0-based (also for unassigned ones).
    pub labels: Vec<usize>,
    /// Confidence of each assignment in [0, 1]: the share of the customer's
    /// affinity that goes to members of its own cluster.
    pub confidence: Vec<f64>,
    /// Whether the confidence reached `min_confidence`; customers below fit no
    /// cluster well and are reported unassigned.
    pub assigned: Vec<bool>,
    pub clusters: usize,
    pub chosen_by: CountChoice,
    /// Each cluster's coherence: the share of its members' affinity that stays
    /// inside it (one minus its normalised cut), in [0, 1].
    pub coherence: Vec<f64>,
    /// Leading eigenvalues of the normalised affinity, largest first.
    pub eigenvalues: Vec<f64>,
}

/// Unit-norm rows of the rank-`d` principal coordinates U·S of `profiles` (m, n).
pub fn features(profiles: &DMatrix<f64>, d: usize, seed: u64) -> DMatrix<f64> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let lr = truncate(profiles, d, 10, 2, None, &mut rng);
    let mut f = lr.u.clone();
    for (c, s) in lr.s.iter().enumerate() {
        f.column_mut(c).scale_mut(*s);
    }
    for mut row in f.row_iter_mut() {
        let nrm = row.norm();
        if nrm > 0.0 {
            row /= nrm;
        }
    }
    f
}

/// Self-expression with an elastic-net penalty restricted to a candidate set (in
/// the spirit of EnSC, You et al. 2016): for each row i, the `candidates` rows
/// most correlated with it are candidates; the weights solve
/// min ½|x_i - A c|² + l1·|c|₁ + ½·ridge·|c|² over them by coordinate descent
/// (with `l1` = 0, one Cholesky solve). The ℓ1 term picks members that span the
/// customer's own subspace; the ridge term spreads weight over several of them,
/// which keeps each class connected. The `k` largest |c| are kept.
pub fn self_expression(f: &DMatrix<f64>, k: usize, ridge: f64, l1: f64, candidates: usize) -> Vec<Vec<(usize, f64)>> {
    let (m, _) = f.shape();
    let ft = f.transpose(); // (d, m): columns are points.
    (0..m)
        .into_par_iter()
        .map(|i| {
            let xi: DVector<f64> = ft.column(i).clone_owned();
            let corr = f * &xi; // (m)
            let mut cand: Vec<(usize, f64)> =
                corr.iter().enumerate().filter(|(j, _)| *j != i).map(|(j, c)| (j, c.abs())).collect();
            let nc = candidates.max(k).min(cand.len());
            if nc == 0 {
                return Vec::new();
            }
            cand.select_nth_unstable_by(nc - 1, |a, b| b.1.total_cmp(&a.1));
            cand.truncate(nc);
            let a = DMatrix::from_fn(ft.nrows(), nc, |r, c| ft[(r, cand[c].0)]);
            let g = a.transpose() * &a;
            let rhs = a.transpose() * &xi;
            let c = if l1 > 0.0 {
                elastic_net_cd(&g, &rhs, l1, ridge)
            } else {
                let mut g = g;
                for t in 0..nc {
                    g[(t, t)] += ridge;
                }
                match g.cholesky() {
                    Some(ch) => ch.solve(&rhs),
                    None => return Vec::new(),
                }
            };
            let mut out: Vec<(usize, f64)> =
                cand.iter().zip(c.iter()).filter(|(_, v)| **v != 0.0).map(|(cj, v)| (cj.0, *v)).collect();
            out.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()));
            out.truncate(k);
            out
        })
        .collect()
}

/// Coordinate descent for min ½cᵀGc - bᵀc + l1|c|₁ + ½ridge|c|² (G = AᵀA, b = Aᵀx).
fn elastic_net_cd(g: &DMatrix<f64>, b: &DVector<f64>, l1: f64, ridge: f64) -> DVector<f64> {
    let n = b.len();
    let mut c = DVector::<f64>::zeros(n);
    // r = b - G c, kept up to date.
    let mut r = b.clone();
    for _ in 0..500 {
        let mut biggest = 0.0f64;
        for t in 0..n {
            let gtt = g[(t, t)];
            let z = r[t] + gtt * c[t];
            let new = z.signum() * (z.abs() - l1).max(0.0) / (gtt + ridge);
            let delta = new - c[t];
            if delta != 0.0 {
                for s in 0..n {
                    r[s] -= g[(s, t)] * delta;
                }
                c[t] = new;
                biggest = biggest.max(delta.abs());
            }
        }
        if biggest < 1e-9 {
            break;
        }
    }
    c
}

/// Symmetric sparse affinity |C| + |C|ᵀ as adjacency lists.
fn affinity(c: &[Vec<(usize, f64)>]) -> Vec<Vec<(usize, f64)>> {
    let m = c.len();
    let mut w: Vec<std::collections::BTreeMap<usize, f64>> = vec![Default::default(); m];
    for (i, row) in c.iter().enumerate() {
        for &(j, v) in row {
            *w[i].entry(j).or_default() += v.abs();
            *w[j].entry(i).or_default() += v.abs();
        }
    }
    w.into_iter().map(|r| r.into_iter().collect()).collect()
}

/// Leading `k` eigenpairs of the normalised affinity D^-1/2 W D^-1/2, by dense
/// eigendecomposition for small populations and block subspace iteration on the
/// sparse operator beyond.
fn leading_eigen(w: &[Vec<(usize, f64)>], k: usize, seed: u64, dense_limit: usize) -> (Vec<f64>, DMatrix<f64>) {
    let m = w.len();
    let deg: Vec<f64> = w.iter().map(|r| r.iter().map(|e| e.1).sum::<f64>()).collect();
    let inv_sqrt: Vec<f64> = deg.iter().map(|d| if *d > 0.0 { 1.0 / d.sqrt() } else { 0.0 }).collect();
    let k = k.min(m);
    if m <= dense_limit {
        let mut a = DMatrix::<f64>::zeros(m, m);
        for (i, row) in w.iter().enumerate() {
            for &(j, v) in row {
                a[(i, j)] = v * inv_sqrt[i] * inv_sqrt[j];
            }
        }
        let eig = SymmetricEigen::new(a);
        let mut order: Vec<usize> = (0..m).collect();
        order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
        let vals = order.iter().take(k).map(|&i| eig.eigenvalues[i]).collect();
        let vecs = DMatrix::from_fn(m, k, |r, c| eig.eigenvectors[(r, order[c])]);
        return (vals, vecs);
    }
    // Subspace iteration on (A + I)/2, whose spectrum is in [0, 1] with the same vectors.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut q = DMatrix::<f64>::from_fn(m, k, |_, _| rng.random_range(-1.0..1.0)).qr().q();
    let apply = |q: &DMatrix<f64>| -> DMatrix<f64> {
        let mut out = q * 0.5;
        for (i, row) in w.iter().enumerate() {
            for &(j, v) in row {
                let a = 0.5 * v * inv_sqrt[i] * inv_sqrt[j];
                for c in 0..q.ncols() {
                    out[(i, c)] += a * q[(j, c)];
                }
            }
        }
        out
    };
    // Stop when the trace of QᵀAQ (the sum of the Ritz values, which rises to its
    // maximum as Q reaches the leading subspace) settles; at most 1000 steps.
    let mut last = f64::NEG_INFINITY;
    for it in 1..=1000 {
        let aq = apply(&q);
        if it % 10 == 0 {
            let trace: f64 = (0..k).map(|c| q.column(c).dot(&aq.column(c))).sum();
            let settled = (trace - last).abs() < 1e-11 * k as f64;
            last = trace;
            if settled {
                break;
            }
        }
        q = aq.qr().q();
    }
    let aq = apply(&q);
    let small = q.transpose() * &aq;
    let eig = SymmetricEigen::new(small);
    let mut order: Vec<usize> = (0..k).collect();
    order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
    let vals = order.iter().map(|&i| 2.0 * eig.eigenvalues[i] - 1.0).collect();
    let rot = DMatrix::from_fn(k, k, |r, c| eig.eigenvectors[(r, order[c])]);
    (vals, q * rot)
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
fn own_share(w: &[Vec<(usize, f64)>], labels: &[usize]) -> Vec<f64> {
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
fn assign(vecs: &DMatrix<f64>, k: usize) -> (Vec<usize>, usize) {
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

/// The sparse affinity `cluster` builds from `profiles`, as adjacency lists
/// (each pair once in each direction), for comparison with other assignments.
pub fn affinity_graph(profiles: &DMatrix<f64>, params: &ClusterParams) -> Vec<Vec<(usize, f64)>> {
    let m = profiles.nrows();
    let f = features(profiles, params.dimension.min(profiles.ncols()).min(m), params.seed);
    affinity(&self_expression(&f, params.neighbors, params.ridge, params.l1, params.candidates))
}

/// Merges the `k` clusters of `labels` pairwise, each time the pair whose
/// union lowers the normalised cut most: Σ (1 - coherence) falls by
/// 1 - coh(A) - coh(B) + coh(A ∪ B). With a `target` count it stops there;
/// without one it merges only the least coherent cluster, and only while that
/// one keeps less than `min_coherence` of its affinity inside. Returns dense
/// 0-based labels and the normalised-cut decrease of each merge, in order.
pub fn merge(
    w: &[Vec<(usize, f64)>],
    labels: &[usize],
    k: usize,
    target: Option<usize>,
    min_coherence: f64,
) -> (Vec<usize>, Vec<f64>) {
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
    let mut decreases = Vec::new();
    let mut count = k;
    while count > target.unwrap_or(1).max(1) {
        let coh = |inside: f64, v: f64| if v > 0.0 { inside / v } else { 1.0 };
        // Without a target, only the least coherent cluster is merged.
        let worst = (0..k)
            .filter(|&c| alive[c])
            .min_by(|&x, &y| coh(between[(x, x)], vol[x]).total_cmp(&coh(between[(y, y)], vol[y])));
        if target.is_none() && worst.is_none_or(|c| coh(between[(c, c)], vol[c]) >= min_coherence) {
            break;
        }
        let mut best: Option<(f64, usize, usize)> = None;
        for a in 0..k {
            for b in a + 1..k {
                if !(alive[a] && alive[b]) || (target.is_none() && Some(a) != worst && Some(b) != worst) {
                    continue;
                }
                let union = coh(between[(a, a)] + between[(b, b)] + 2.0 * between[(a, b)], vol[a] + vol[b]);
                let decrease = 1.0 - coh(between[(a, a)], vol[a]) - coh(between[(b, b)], vol[b]) + union;
                if best.is_none_or(|x| decrease > x.0) {
                    best = Some((decrease, a, b));
                }
            }
        }
        let Some((decrease, a, b)) = best else { break };
        decreases.push(decrease);
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
    (out, decreases)
}

/// "assigned" or "unassigned" for a stored confidence, by the default
/// `min_confidence` (the one clustering jobs use).
pub fn status(confidence: f64) -> &'static str {
    if confidence >= ClusterParams::default().min_confidence {
        "assigned"
    } else {
        "unassigned"
    }
}

/// Clusters the rows of `profiles` (customers × intervals, kW).
pub fn cluster(profiles: &DMatrix<f64>, params: &ClusterParams) -> Result<Clustering, FieldError> {
    params.check()?;
    let m = profiles.nrows();
    if m < 2 {
        return Err(FieldError::new("profiles", format!("{m} customers: at least 2 are needed")));
    }
    if params.clusters.is_none() && m > params.count_sample {
        // The count on a sample, then the whole population merged to it.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(params.seed);
        let rows = rand::seq::index::sample(&mut rng, m, params.count_sample).into_vec();
        let sample = profiles.select_rows(&rows);
        let k = cluster(&sample, params)?.clusters.max(2);
        let mut c = cluster(profiles, &ClusterParams { clusters: Some(k), ..params.clone() })?;
        c.chosen_by = CountChoice::Coherence;
        return Ok(c);
    }
    let w = affinity_graph(profiles, params);
    // Over-segment into at least max_clusters pieces (fewer for tiny populations).
    let pieces = params.clusters.unwrap_or(0).max(params.max_clusters).min(m - 1).max(2);
    let (vals, vecs) = leading_eigen(&w, pieces + 1, params.seed, params.dense_limit);
    let (over, found) = assign(&vecs, pieces);
    let target = params.clusters.map(|c| c.min(found));
    let (labels, _) = merge(&w, &over, found, target, params.min_coherence);
    let k = labels.iter().max().map_or(0, |v| v + 1);
    let confidence = own_share(&w, &labels);
    let assigned = confidence.iter().map(|c| *c >= params.min_confidence).collect();
    let coherence = coherence(&w, &labels, k);
    let chosen_by = if params.clusters.is_some() { CountChoice::Operator } else { CountChoice::Coherence };
    Ok(Clustering { labels, confidence, assigned, clusters: k, chosen_by, coherence, eigenvalues: vals })
}

/// A cluster's representative days: the mean over its members of their mean
/// working day and mean weekend day (UTC days of the window), per interval, kW.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Representative {
    pub cluster: usize,
    pub size: usize,
    pub weekday_kw: Vec<f64>,
    pub weekend_kw: Vec<f64>,
}

/// Representative shapes of each cluster. `window_start` is the UTC epoch second
/// of column 0; `interval_s` divides a day.
pub fn representatives(
    profiles: &DMatrix<f64>,
    c: &Clustering,
    window_start: i64,
    interval_s: u32,
) -> Vec<Representative> {
    let per_day = (86_400 / interval_s.max(1)) as usize;
    let mut out: Vec<Representative> = (0..c.clusters)
        .map(|k| Representative { cluster: k, size: 0, weekday_kw: vec![0.0; per_day], weekend_kw: vec![0.0; per_day] })
        .collect();
    let mut counts = vec![[vec![0usize; per_day], vec![0usize; per_day]]; c.clusters];
    for (i, &l) in c.labels.iter().enumerate() {
        out[l].size += 1;
        for j in 0..profiles.ncols() {
            let t = window_start + j as i64 * i64::from(interval_s);
            let weekend = (t.div_euclid(86_400) + 3).rem_euclid(7) >= 5;
            let slot = (t.rem_euclid(86_400) / i64::from(interval_s)) as usize % per_day;
            let target = if weekend { &mut out[l].weekend_kw } else { &mut out[l].weekday_kw };
            target[slot] += profiles[(i, j)];
            counts[l][usize::from(weekend)][slot] += 1;
        }
    }
    for (r, cnt) in out.iter_mut().zip(&counts) {
        for (v, n) in r.weekday_kw.iter_mut().zip(&cnt[0]) {
            *v /= (*n).max(1) as f64;
        }
        for (v, n) in r.weekend_kw.iter_mut().zip(&cnt[1]) {
            *v /= (*n).max(1) as f64;
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;
    use rand_distr::{Distribution, Normal};

    #[test]
    fn each_bad_field_is_named() {
        let d = ClusterParams::default;
        let cases = [
            (ClusterParams { clusters: Some(1), ..d() }, "clusters"),
            (ClusterParams { max_clusters: 1, ..d() }, "max_clusters"),
            (ClusterParams { dimension: 0, ..d() }, "dimension"),
            (ClusterParams { neighbors: 0, ..d() }, "neighbors"),
            (ClusterParams { ridge: 0.0, ..d() }, "ridge"),
            (ClusterParams { l1: 2.0, ..d() }, "l1"),
            (ClusterParams { candidates: 0, ..d() }, "candidates"),
            (ClusterParams { min_coherence: 1.0, ..d() }, "min_coherence"),
            (ClusterParams { min_confidence: -0.1, ..d() }, "min_confidence"),
            (ClusterParams { count_sample: 10, ..d() }, "count_sample"),
            (ClusterParams { dense_limit: 9000, ..d() }, "dense_limit"),
        ];
        for (p, f) in cases {
            assert_eq!(p.check().unwrap_err().field, f);
        }
    }

    /// One class of 240 customers with individual variation, two of 30: at the
    /// true count the small ones stay apart and the big one whole; at the
    /// automatic count no cluster mixes classes (the count itself is 6 here:
    /// each customer's habit is a shifted wave, and the big class's pieces keep
    /// 72-80% of their weight, above the coherence rule's 70%).
    #[test]
    fn a_dominant_class_is_not_split_to_make_room() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        let noise = Normal::new(0.0, 0.15).unwrap();
        let shape = |k: usize, j: usize| 1.0 + ((j % 96) as f64 / 96.0 * std::f64::consts::TAU * (k + 1) as f64).sin();
        let class = |i: usize| if i < 240 { 0 } else { 1 + (i - 240) / 30 };
        let habits: Vec<f64> = (0..300).map(|_| rng.random_range(0.0..0.6)).collect();
        let x = DMatrix::from_fn(300, 192, |i, j| {
            let own = if class(i) == 0 { habits[i] * shape(4, j + 7 * i) } else { 0.0 };
            (shape(class(i), j) + own + noise.sample(&mut rng)).max(0.0)
        });
        let c = cluster(&x, &ClusterParams { dimension: 10, clusters: Some(3), ..Default::default() }).unwrap();
        for i in 0..300 {
            for j in 0..300 {
                assert_eq!(c.labels[i] == c.labels[j], class(i) == class(j), "{i} {j}");
            }
        }
        let auto = cluster(&x, &ClusterParams { dimension: 10, ..Default::default() }).unwrap();
        assert_eq!(auto.clusters, 6, "{:?}", auto.coherence);
        for i in 0..300 {
            for j in 0..300 {
                assert!(auto.labels[i] != auto.labels[j] || class(i) == class(j), "{i} {j}");
            }
        }
    }

    #[test]
    fn separates_three_planted_shapes_and_counts_them() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        let noise = Normal::new(0.0, 0.05).unwrap();
        let shapes: Vec<Vec<f64>> = (0..3)
            .map(|k| {
                (0..192)
                    .map(|j| 1.0 + ((j % 96) as f64 / 96.0 * std::f64::consts::TAU * (k + 1) as f64).sin())
                    .collect()
            })
            .collect();
        let m = 150;
        let x = DMatrix::from_fn(m, 192, |i, j| {
            (shapes[i % 3][j] * (0.5 + (i % 7) as f64 * 0.1) + noise.sample(&mut rng)).max(0.0)
        });
        let c = cluster(&x, &ClusterParams { dimension: 6, max_clusters: 8, ..Default::default() }).unwrap();
        assert_eq!(c.clusters, 3, "{:?}", &c.eigenvalues);
        for i in 0..m {
            for j in 0..m {
                assert_eq!(c.labels[i] == c.labels[j], i % 3 == j % 3);
            }
        }
        assert!(c.confidence.iter().all(|v| (0.0..=1.0).contains(v)));
        assert_eq!((c.coherence.len(), c.assigned.len(), c.chosen_by), (3, m, CountChoice::Coherence));
        // Counted on a sample of 100, then all 150 merged to that count.
        let sampled = cluster(&x, &ClusterParams { dimension: 6, count_sample: 100, ..Default::default() }).unwrap();
        assert_eq!((sampled.clusters, sampled.chosen_by), (3, CountChoice::Coherence));
        let reps = representatives(&x, &c, 1_700_006_400, 900);
        assert_eq!(reps.iter().map(|r| r.size).sum::<usize>(), m);
        assert!(cluster(&DMatrix::zeros(1, 5), &ClusterParams::default()).is_err());
        // Two or three customers: too few eigenvalues for a gap, still no panic.
        for m in 2..=3 {
            let c = cluster(&x.rows(0, m).clone_owned(), &ClusterParams::default()).unwrap();
            assert!(c.clusters >= 1 && c.clusters <= m && c.labels.len() == m);
        }
    }
}
