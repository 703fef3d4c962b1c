//! The solver's starting estimate: per-level conditional means under a flat
//! prior fitted to the level counts, missing entries filled by their interval's mean.

use nalgebra::DMatrix;

use super::table::LikelihoodTable;
use super::{LevelMatrix, MISSING};

/// Per-level conditional mean E[x | level] under a flat prior on [0, c], kW, for
/// each c of a grid up to alpha: returns (level means, P(level)) per c.
fn flat_prior_moments(table: &LikelihoodTable, c: f64) -> (Vec<f64>, Vec<f64>) {
    let k = table.profile().levels();
    let steps = 2000;
    let mut num = vec![0.0; k];
    let mut den = vec![0.0; k];
    for i in 0..=steps {
        let x = c * i as f64 / steps as f64;
        let w = if i == 0 || i == steps { 0.5 } else { 1.0 };
        for (level, (nu, de)) in num.iter_mut().zip(den.iter_mut()).enumerate() {
            let p = table.eval(level as u8, x).0.exp() * w;
            *nu += p * x;
            *de += p;
        }
    }
    let total: f64 = den.iter().sum();
    let means = num.iter().zip(&den).map(|(n, d)| if *d > 0.0 { n / d } else { 0.5 * c }).collect();
    (means, den.iter().map(|d| d / total).collect())
}

/// Per-level conditional means E[x | level] under a flat prior on [0, c], with
/// c ∈ (0, alpha] chosen by maximum marginal likelihood of the observed level
/// counts. A flat prior over the whole service range would put the top level's
/// mean near alpha/2, far above any household; fitting c keeps it honest.
pub fn conditional_means(table: &LikelihoodTable, alpha: f64, level_counts: &[u64]) -> Vec<f64> {
    let grid = 60;
    let mut best: Option<(f64, Vec<f64>)> = None;
    for g in 1..=grid {
        let c = alpha * g as f64 / grid as f64;
        let (means, probs) = flat_prior_moments(table, c);
        let ll: f64 = level_counts.iter().zip(&probs).map(|(&n, &p)| n as f64 * p.max(1e-300).ln()).sum();
        if best.as_ref().is_none_or(|b| ll > b.0) {
            best = Some((ll, means));
        }
    }
    best.map(|b| b.1).unwrap_or_else(|| vec![0.5 * alpha; table.profile().levels()])
}

/// How many readings have each level.
pub fn level_counts(levels: &LevelMatrix, k: usize) -> Vec<u64> {
    let mut c = vec![0u64; k];
    for &v in levels.as_slice() {
        if v != MISSING && usize::from(v) < k {
            c[usize::from(v)] += 1;
        }
    }
    c
}

/// Per-entry conditional means, missing entries filled by their interval's mean
/// over the meters that reported (or the overall mean). The solver's start, and
/// the per-reading baseline tests compare against.
pub fn initial_estimate(levels: &LevelMatrix, table: &LikelihoodTable, alpha: f64) -> DMatrix<f64> {
    let cm = conditional_means(table, alpha, &level_counts(levels, table.profile().levels()));
    let (m, n) = (levels.rows(), levels.cols());
    let mut x = DMatrix::zeros(m, n);
    let mut total = (0.0, 0usize);
    let mut col_means = vec![None; n];
    for j in 0..n {
        let (mut s, mut c) = (0.0, 0usize);
        for i in 0..m {
            if let Some(l) = levels.get(i, j) {
                x[(i, j)] = cm[usize::from(l)];
                s += x[(i, j)];
                c += 1;
            }
        }
        if c > 0 {
            col_means[j] = Some(s / c as f64);
            total.0 += s;
            total.1 += c;
        }
    }
    let overall = if total.1 > 0 { total.0 / total.1 as f64 } else { 0.0 };
    for j in 0..n {
        for i in 0..m {
            if levels.get(i, j).is_none() {
                x[(i, j)] = col_means[j].unwrap_or(overall);
            }
        }
    }
    x
}
