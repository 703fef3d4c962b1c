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
//! normalised cut most therefore joins the pieces first.
//!
//! The count, unless the operator sets it, is the largest whose partition
//! survives resampling: clustered afresh on random 80% subsamples, the same
//! partition comes back (mean adjusted Rand index ≥ `min_stability`). Cuts
//! through one class (a household blob, a mixed-use arc) fall in different
//! places on each subsample; cuts between classes do not.
//!
//! Profiles for clustering need a higher rank than profiles for settlement:
//! below the number of classes the classes are gone. [`representation`] fits
//! the levels at [`CLUSTER_RANK`] for that purpose.

use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rayon::prelude::*;

use crate::error::FieldError;
use crate::recovery::linalg::truncate;
use crate::recovery::outage::DayLayout;
use crate::recovery::{recover, Diagnostics, LevelMatrix, ProgressFn, RankChoice, RecoveryParams, SumConstraint};
use crate::DitherProfile;

mod assignment;
mod count;
mod spectrum;

pub use assignment::{coherence, merge, qr_assign};
use assignment::{over_segment, own_share, Pieces};
pub use count::{adjusted_rand, count_stability, stable_count};
use count::{merge_path, stability_of};
use spectrum::leading_eigen;
pub use spectrum::{EigenSolve, EigenStop};

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
) -> Result<(DMatrix<f64>, Diagnostics), FieldError> {
    let params = RecoveryParams {
        rank: RankChoice::Fixed(CLUSTER_RANK),
        alpha_kw,
        max_iterations: CLUSTER_FIT_ITERATIONS,
        ..Default::default()
    }
    .check()?;
    let fit = recover(levels, profile, constraints, layout, &params, progress)?;
    Ok((fit.x, fit.diagnostics))
}

#[derive(Debug, Clone, PartialEq)]
pub struct ClusterParams {
    /// Number of clusters, or `None` for the stability rule. Default `None`.
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
    /// The stability rule: without an operator's count, the count is the
    /// largest whose partition random 80% subsamples, clustered afresh,
    /// reproduce with a mean adjusted Rand index of at least this. Default 0.92
    /// (chosen on the test populations: at 0.90 two of five came out one too
    /// high; see README).
    pub min_stability: f64,
    /// Subsamples drawn for the stability rule. Default 5.
    pub stability_draws: usize,
    /// A meter whose own cluster receives less than this share of its affinity
    /// is reported unassigned. Default 0.5 (most of its neighbours elsewhere).
    pub min_confidence: f64,
    /// Above this many customers the stability rule counts on a random sample
    /// of this size, and the whole population is then merged to that count:
    /// the rule's cost is its subsamples' clusterings, and it was measured at
    /// these sizes. Default 2000 (classes under 0.2% of the customers may go
    /// uncounted).
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
            min_stability: 0.92,
            stability_draws: 5,
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
        if !(self.min_stability > 0.0 && self.min_stability <= 1.0) {
            return Err(FieldError::new("min_stability", "must be in (0, 1]"));
        }
        if !(1..=50).contains(&self.stability_draws) {
            return Err(FieldError::new("stability_draws", "must be between 1 and 50"));
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
    Stability,
}

impl CountChoice {
    pub fn as_str(self) -> &'static str {
        match self {
            Self::Operator => "operator",
            Self::Stability => "stability",
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
    /// How the eigensolver stopped.
    pub eigen: EigenSolve,
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

/// The sparse affinity `cluster` builds from `profiles`, as adjacency lists
/// (each pair once in each direction), for comparison with other assignments.
pub fn affinity_graph(profiles: &DMatrix<f64>, params: &ClusterParams) -> Vec<Vec<(usize, f64)>> {
    let m = profiles.nrows();
    let f = features(profiles, params.dimension.min(profiles.ncols()).min(m), params.seed);
    affinity(&self_expression(&f, params.neighbors, params.ridge, params.l1, params.candidates))
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
    // Over-segment into at least max_clusters pieces (fewer for tiny populations).
    let pieces =
        over_segment(profiles, params, params.clusters.unwrap_or(0).max(params.max_clusters).min(m - 1).max(2));
    let (target, chosen_by) = match params.clusters {
        Some(t) => (t, CountChoice::Operator),
        // The stability rule, on a sample of count_sample customers...
        None if m > params.count_sample => {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(params.seed);
            let sample = profiles.select_rows(&rand::seq::index::sample(&mut rng, m, params.count_sample).into_vec());
            let stability = count_stability(&sample, params, params.stability_draws);
            (stable_count(&stability, params.min_stability), CountChoice::Stability)
        }
        // ...or on the whole population, whose merge path is at hand.
        None => {
            let stability = stability_of(profiles, &merge_path(&pieces), params, params.stability_draws);
            (stable_count(&stability, params.min_stability), CountChoice::Stability)
        }
    };
    let Pieces { w, vals, eigen, over, found } = pieces;
    let labels = merge(&w, &over, found, target.min(found));
    let k = labels.iter().max().map_or(0, |v| v + 1);
    let confidence = own_share(&w, &labels);
    let assigned = confidence.iter().map(|c| *c >= params.min_confidence).collect();
    let coherence = coherence(&w, &labels, k);
    Ok(Clustering { labels, confidence, assigned, clusters: k, chosen_by, coherence, eigenvalues: vals, eigen })
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

/// Representative shapes of each cluster over a local day in `tz`: slot 0 is
/// local midnight, and weekends are local Saturdays and Sundays. `window_start`
/// is the UTC epoch second of column 0; `interval_s` divides a day.
pub fn representatives(
    profiles: &DMatrix<f64>,
    c: &Clustering,
    (window_start, tz): (i64, crate::Tz),
    interval_s: u32,
) -> Vec<Representative> {
    use chrono::{Datelike, Offset, TimeZone};
    let per_day = (86_400 / interval_s.max(1)) as usize;
    let mut out: Vec<Representative> = (0..c.clusters)
        .map(|k| Representative { cluster: k, size: 0, weekday_kw: vec![0.0; per_day], weekend_kw: vec![0.0; per_day] })
        .collect();
    let mut counts = vec![[vec![0usize; per_day], vec![0usize; per_day]]; c.clusters];
    for (i, &l) in c.labels.iter().enumerate() {
        out[l].size += 1;
        for j in 0..profiles.ncols() {
            let t = window_start + j as i64 * i64::from(interval_s);
            let local = tz.timestamp_opt(t, 0).single();
            let offset = local.map_or(0, |d| i64::from(d.offset().fix().local_minus_utc()));
            let weekend = local.map_or(crate::domain::utc_weekday(t) >= 5, |d| d.weekday().number_from_monday() >= 6);
            let slot = ((t + offset).rem_euclid(86_400) / i64::from(interval_s)) as usize % per_day;
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

    /// Against scikit-learn 1.8's adjusted_rand_score on the same labellings
    /// (0.5714285714285714 and 0.24242424242424243, run by hand).
    #[test]
    fn adjusted_rand_matches_known_values() {
        assert_eq!(adjusted_rand(&[0, 0, 1, 1], &[1, 1, 0, 0]), 1.0);
        assert!((adjusted_rand(&[0, 0, 1, 2], &[0, 0, 1, 1]) - 0.5714285714285714).abs() < 1e-12);
        assert!((adjusted_rand(&[0, 0, 0, 1, 1, 1], &[0, 0, 1, 1, 2, 2]) - 0.24242424242424243).abs() < 1e-12);
    }

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
            (ClusterParams { min_stability: 0.0, ..d() }, "min_stability"),
            (ClusterParams { stability_draws: 0, ..d() }, "stability_draws"),
            (ClusterParams { min_confidence: -0.1, ..d() }, "min_confidence"),
            (ClusterParams { count_sample: 10, ..d() }, "count_sample"),
            (ClusterParams { dense_limit: 9000, ..d() }, "dense_limit"),
        ];
        for (p, f) in cases {
            assert_eq!(p.check().unwrap_err().field, f);
        }
    }

    /// One class of 240 customers with individual variation (each habit a
    /// shifted wave), two of 30: the small ones stay apart and the big one
    /// whole, at the true count and at the stability rule's.
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
        assert_eq!(auto.clusters, 3, "{:?}", auto.coherence);
        assert_eq!(adjusted_rand(&auto.labels, &c.labels), 1.0);
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
        assert_eq!((c.coherence.len(), c.assigned.len(), c.chosen_by), (3, m, CountChoice::Stability));
        // Counted on a sample of 100, then all 150 merged to that count.
        let sampled = cluster(&x, &ClusterParams { dimension: 6, count_sample: 100, ..Default::default() }).unwrap();
        assert_eq!((sampled.clusters, sampled.chosen_by), (3, CountChoice::Stability));
        // The dense eigensolver is direct; the subspace iteration reports its settling.
        assert_eq!(c.eigen, EigenSolve { stop: EigenStop::Direct, iterations: 0 });
        let sparse =
            cluster(&x, &ClusterParams { dimension: 6, max_clusters: 8, dense_limit: 50, ..Default::default() })
                .unwrap();
        // Nine vectors for three shapes: the 9th and 10th eigenvalues lie close
        // together inside the shapes, so the iteration runs to its limit and says so.
        assert_eq!(sparse.eigen, EigenSolve { stop: EigenStop::MaxIterations, iterations: 1000 });
        assert_eq!(adjusted_rand(&sparse.labels, &c.labels), 1.0);
        let reps = representatives(&x, &c, (1_700_006_400, crate::Tz::UTC), 900);
        assert_eq!(reps.iter().map(|r| r.size).sum::<usize>(), m);
        assert!(cluster(&DMatrix::zeros(1, 5), &ClusterParams::default()).is_err());
        // Two or three customers: too few eigenvalues for a gap, still no panic.
        for m in 2..=3 {
            let c = cluster(&x.rows(0, m).clone_owned(), &ClusterParams::default()).unwrap();
            assert!(c.clusters >= 1 && c.clusters <= m && c.labels.len() == m);
        }
    }

    #[test]
    fn representative_days_are_local_days() {
        // One customer, 2 days of hourly columns from Friday 2023-01-06 00:00
        // UTC, drawing 5 kW only at 00:00 UTC. In Paris (UTC+1 in winter, a
        // fact of the zone) that is 01:00 local; Saturday starts at 23:00 UTC
        // on Friday, so the second spike falls on a local weekend day.
        let start = 1_672_963_200;
        let x = DMatrix::from_fn(1, 48, |_, j| if j % 24 == 0 { 5.0 } else { 1.0 });
        let c = Clustering {
            labels: vec![0],
            confidence: vec![1.0],
            assigned: vec![true],
            clusters: 1,
            chosen_by: CountChoice::Operator,
            coherence: vec![1.0],
            eigenvalues: vec![],
            eigen: EigenSolve { stop: EigenStop::Direct, iterations: 0 },
        };
        let paris: crate::Tz = "Europe/Paris".parse().unwrap();
        let local = representatives(&x, &c, (start, paris), 3600);
        assert_eq!((local[0].weekday_kw[1], local[0].weekday_kw[2]), (5.0, 1.0));
        assert_eq!((local[0].weekend_kw[0], local[0].weekend_kw[1]), (1.0, 5.0));
        let utc = representatives(&x, &c, (start, crate::Tz::UTC), 3600);
        assert_eq!((utc[0].weekday_kw[0], utc[0].weekday_kw[1]), (5.0, 1.0));
        assert_eq!((utc[0].weekend_kw[0], utc[0].weekend_kw[1]), (5.0, 1.0));
    }
}
