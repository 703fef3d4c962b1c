//! The fit's own uncertainty, by a parametric bootstrap.
//!
//! The bands of [`crate::aggregate`] take the recovered profile as known and
//! widen it only by what each meter's levels show. What they miss is the
//! error of the profile itself: smooth, shared by a meter's intervals and by
//! meters of one shape, invisible in any one meter's levels. The bootstrap
//! asks the fit how far it moves: it draws loads from the fitted model (the
//! recovered profile plus each meter's spread, an offset per block and one per
//! interval), dithers and quantizes them as a gateway would (the same readings
//! missing; register reads summed from the drawn loads), refits at the same
//! rank started from the fit, and keeps, per draw, how far each interval's
//! estimate given its level moves between the profile the draw came from and
//! the refit. The mean square of those shifts summed over any aggregate's
//! intervals (a group's meters at one interval, one meter's day or tariff
//! band) is the variance that aggregate's band adds for the fit.
//!
//! The shifts are kept as a low-rank factorisation per draw (the difference of
//! two rank-r profiles, through each level's posterior), so a service can keep
//! them beside a recovery and serve any group or bucket later.

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::aggregate::{dither_sd, interval_moments, Spread, BLOCK_S};
use crate::error::FieldError;
use crate::mechanism::dither_and_quantize;
use crate::recovery::linalg::{truncate, LowRank};
use crate::recovery::outage::DayLayout;
use crate::recovery::{
    recover_from, LevelMatrix, RankChoice, RecoveryParams, SumConstraint, ValidRecoveryParams, WarmStart,
};
use crate::DitherProfile;

/// Draws of a parametric bootstrap, 8 unless asked otherwise: measured on the
/// reference populations (README "Group loads and their bands").
pub const DEFAULT_DRAWS: usize = 8;

/// At most this many draws per recovery (each is a refit).
pub const MAX_DRAWS: usize = 32;

/// The shifts of every draw, each as a low-rank factorisation (meters ×
/// intervals).
#[derive(Debug, Clone, Default)]
pub struct FitDraws {
    pub shifts: Vec<LowRank>,
}

/// Loads drawn from the fitted model: the recovered profile plus each meter's
/// spread (an offset per block of `BLOCK_S` and one per interval), kept in
/// [0, alpha].
fn drawn_loads(x: &DMatrix<f64>, spreads: &[Spread], block: usize, alpha: f64, rng: &mut impl Rng) -> DMatrix<f64> {
    let mut t = x.clone();
    for i in 0..x.nrows() {
        let mut offset = 0.0;
        for j in 0..x.ncols() {
            if j % block == 0 {
                let z: f64 = StandardNormal.sample(rng);
                offset = spreads[i].shared * z;
            }
            let z: f64 = StandardNormal.sample(rng);
            t[(i, j)] = (x[(i, j)] + offset + spreads[i].own * z).clamp(0.0, alpha);
        }
    }
    t
}

/// Each interval's estimate of the load given its level (`aggregate::interval_moments`).
fn posterior(x: &DMatrix<f64>, levels: &LevelMatrix, taus: &[f64], sd: f64, bounds: &[f64]) -> DMatrix<f64> {
    DMatrix::from_fn(x.nrows(), x.ncols(), |i, j| interval_moments(x[(i, j)], taus[i], sd, bounds, levels.get(i, j)).0)
}

/// Everything one bootstrap needs of the recovery it checks.
pub struct Fit<'a> {
    /// The recovered profile (meters × intervals, kW) and its rank.
    pub x: &'a DMatrix<f64>,
    pub rank: usize,
    pub levels: &'a LevelMatrix,
    pub profile: &'a DitherProfile,
    pub constraints: &'a [SumConstraint],
    pub layout: DayLayout,
    pub spreads: &'a [Spread],
    /// The parameters the recovery ran with (its rank is fixed for the refits).
    pub params: &'a ValidRecoveryParams,
}

/// Runs `draws` refits (at most [`MAX_DRAWS`]) of loads drawn from `fit`.
pub fn fit_draws(fit: &Fit<'_>, draws: usize, rng: &mut impl Rng) -> Result<FitDraws, FieldError> {
    if draws > MAX_DRAWS {
        return Err(FieldError::new("band_draws", format!("at most {MAX_DRAWS}")));
    }
    let (m, n) = fit.x.shape();
    if fit.spreads.len() != m || fit.levels.rows() != m || fit.levels.cols() != n {
        return Err(FieldError::new("spreads", "must hold one spread per meter of the fit"));
    }
    let params = RecoveryParams { rank: RankChoice::Fixed(fit.rank.max(1)), ..fit.params.get().clone() }.check()?;
    let alpha = params.get().alpha_kw;
    let (sd, bounds) = (dither_sd(fit.profile), fit.profile.boundaries_kw());
    let taus: Vec<f64> = fit.spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let block = (BLOCK_S / fit.layout.interval_s.max(1)).max(1) as usize;
    let keep = (2 * fit.rank).min(m).min(n);
    let mut out = FitDraws::default();
    for _ in 0..draws {
        let t = drawn_loads(fit.x, fit.spreads, block, alpha, rng);
        let mut lv = LevelMatrix::missing(m, n);
        for j in 0..n {
            for i in 0..m {
                if fit.levels.get(i, j).is_some() {
                    lv.set(i, j, Some(dither_and_quantize(fit.profile, t[(i, j)], rng)));
                }
            }
        }
        let reads: Vec<SumConstraint> = fit
            .constraints
            .iter()
            .map(|c| SumConstraint { sum_kw: c.cols.clone().map(|j| t[(c.row, j)]).sum(), ..c.clone() })
            .collect();
        let warm = WarmStart { x: fit.x.clone(), rank: fit.rank };
        let again = recover_from(&lv, fit.profile, &reads, fit.layout, &params, Some(&warm), &mut |_, _| {})?;
        let shift = posterior(&again.x, &lv, &taus, sd, bounds) - posterior(fit.x, &lv, &taus, sd, bounds);
        out.shifts.push(truncate(&shift, keep, 6, 2, None, rng));
    }
    Ok(out)
}

impl FitDraws {
    /// The variance (kW²) the fit adds to the sum of `cells` (meter, interval):
    /// the mean over draws of the square of their summed shifts.
    pub fn variance_of(&self, cells: &mut dyn Iterator<Item = (usize, usize)>) -> f64 {
        if self.shifts.is_empty() {
            return 0.0;
        }
        let r = self.shifts.iter().map(LowRank::rank).max().unwrap_or(0);
        // Σ_cells U_i · diag(s) · V_jᵀ, per draw: accumulate Σ u_ik v_jk.
        let mut acc = vec![vec![0.0; r]; self.shifts.len()];
        for (i, j) in cells {
            for (a, d) in acc.iter_mut().zip(&self.shifts) {
                for k in 0..d.rank() {
                    a[k] += d.u[(i, k)] * d.v[(j, k)];
                }
            }
        }
        let total: f64 = acc
            .iter()
            .zip(&self.shifts)
            .map(|(a, d)| a.iter().zip(&d.s).map(|(x, s)| x * s).sum::<f64>().powi(2))
            .sum();
        total / self.shifts.len() as f64
    }

    /// Per interval, the variance the fit adds to the load of the meters `rows`.
    pub fn group_variances(&self, rows: &[usize], intervals: usize) -> Vec<f64> {
        (0..intervals).map(|j| self.variance_of(&mut rows.iter().map(|&i| (i, j)))).collect()
    }

    /// Per bucket, the variance the fit adds to one meter's sum over the
    /// bucket's intervals (`bucket[j]`: the bucket of interval j).
    pub fn bucket_variances(&self, row: usize, bucket: &[Option<usize>], buckets: usize) -> Vec<f64> {
        let mut sums = vec![vec![0.0; buckets]; self.shifts.len()];
        for (b, d) in self.shifts.iter().enumerate() {
            for (j, k) in bucket.iter().enumerate() {
                let Some(k) = k else { continue };
                let v: f64 = (0..d.rank()).map(|c| d.u[(row, c)] * d.s[c] * d.v[(j, c)]).sum();
                sums[b][*k] += v;
            }
        }
        (0..buckets).map(|k| sums.iter().map(|s| s[k] * s[k]).sum::<f64>() / sums.len().max(1) as f64).collect()
    }
}
