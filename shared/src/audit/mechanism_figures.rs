//! Per-reading figures of the mechanism that need no attacker model: the mutual
//! information between a reading and its level, and the local
//! differential-privacy epsilon.

use serde::{Deserialize, Serialize};

use crate::mechanism::log_likelihood;
use crate::profile::DitherProfile;

/// Mutual information (bits) between a reading and its level, for readings
/// distributed as the given sample (equal weights).
pub fn mutual_information_bits(profile: &DitherProfile, sample_kw: &[f64]) -> f64 {
    let k = profile.levels();
    if sample_kw.is_empty() {
        return 0.0;
    }
    let mut marginal = vec![0.0; k];
    let mut cond_entropy = 0.0;
    for &x in sample_kw {
        for (l, m) in marginal.iter_mut().enumerate() {
            let (lp, _) = log_likelihood(profile, l as u8, x);
            let p = lp.exp();
            *m += p;
            if p > 0.0 {
                cond_entropy -= p * lp;
            }
        }
    }
    let w = sample_kw.len() as f64;
    let h: f64 = marginal.iter().map(|m| m / w).filter(|p| *p > 0.0).map(|p| -p * p.ln()).sum();
    ((h - cond_entropy / w) / std::f64::consts::LN_2).max(0.0)
}

/// Local differential-privacy epsilon of the mechanism for readings in [lo, hi]:
/// max over levels and pairs of readings of log P(level | x) / P(level | x').
/// Finite because both noise families have full support; a bounded-support
/// dither would give infinity. Evaluated on a grid of 4001 points, refined by
/// golden-section search around each level's most likely reading.
pub fn ldp_epsilon(profile: &DitherProfile, lo: f64, hi: f64) -> f64 {
    let grid = 4000;
    let xs: Vec<f64> = (0..=grid).map(|g| lo + (hi - lo) * g as f64 / grid as f64).collect();
    (0..profile.levels() as u8)
        .map(|l| {
            let lp: Vec<f64> = xs.iter().map(|x| log_likelihood(profile, l, *x).0).collect();
            let (imax, _) =
                lp.iter().enumerate().fold((0, f64::NEG_INFINITY), |b, (i, v)| if *v > b.1 { (i, *v) } else { b });
            // Each level's probability is unimodal in x: refine its maximum.
            let (mut a, mut b) = (xs[imax.saturating_sub(1)], xs[(imax + 1).min(grid)]);
            let f = |x: f64| log_likelihood(profile, l, x).0;
            let g = 0.5 * (5f64.sqrt() - 1.0);
            for _ in 0..60 {
                let (c, d) = (b - g * (b - a), a + g * (b - a));
                if f(c) > f(d) {
                    b = d;
                } else {
                    a = c;
                }
            }
            let max = f(0.5 * (a + b)).max(lp[imax]);
            // The minimum of a unimodal function over an interval is at an end.
            let min = lp[0].min(lp[grid]);
            max - min
        })
        .fold(0.0, f64::max)
}

/// Per-reading figures of the mechanism that need no attacker model.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct MechanismFigures {
    /// I(reading; level), bits, over the feeder's reading distribution.
    pub mutual_information_bits: f64,
    /// log2 of the number of levels: what a noiseless level would carry at most.
    pub level_bits: f64,
    /// LDP epsilon over [0, alpha].
    pub ldp_epsilon: f64,
    pub ldp_range_kw: [f64; 2],
    /// LDP epsilon over [0, the feeder's 99th-percentile reading].
    pub ldp_epsilon_typical: f64,
    pub ldp_typical_range_kw: [f64; 2],
    pub note: String,
}

pub fn mechanism_figures(profile: &DitherProfile, readings_kw: &[f64], alpha: f64) -> MechanismFigures {
    let stride = (readings_kw.len() / 100_000).max(1);
    let sample: Vec<f64> = readings_kw.iter().step_by(stride).copied().collect();
    let mut sorted = sample.clone();
    sorted.sort_by(f64::total_cmp);
    let p99 = sorted.get(sorted.len().saturating_sub(1) * 99 / 100).copied().unwrap_or(alpha).max(0.1);
    MechanismFigures {
        mutual_information_bits: mutual_information_bits(profile, &sample),
        level_bits: (profile.levels() as f64).log2(),
        ldp_epsilon: ldp_epsilon(profile, 0.0, alpha),
        ldp_range_kw: [0.0, alpha],
        ldp_epsilon_typical: ldp_epsilon(profile, 0.0, p99),
        ldp_typical_range_kw: [0.0, p99],
        note: format!(
            "epsilon is finite only because {} dither has full support (a bounded dither gives infinity); \
             with epsilon this large the per-reading guarantee is weak, and what protects a household is the \
             low information per reading, not a differential-privacy bound",
            profile.noise().as_str()
        ),
    }
}
