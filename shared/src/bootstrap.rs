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
//! intervals (a group's meters at one interval; one meter's day or tariff
//! band, less what the meter's own spread already holds) is the variance
//! that aggregate's band adds for the fit.
//!
//! The shifts are kept as a low-rank factorisation per draw (the difference of
//! two rank-r profiles, through each level's posterior), so a service can keep
//! them beside a recovery and serve any group or bucket later.

use nalgebra::DMatrix;
use rand::Rng;
use rand_distr::{Distribution, StandardNormal};
use serde::{Deserialize, Serialize};

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
/// spread (an offset per block of `BLOCK_S` and one per interval), gaussian
/// and not floored at 0, as the bands' model has it: floored, a small load's
/// draws average above its profile, and every refit then moved up by that
/// floor, which counted as the fit's error (household bands covered 99%).
fn drawn_loads(x: &DMatrix<f64>, spreads: &[Spread], block: usize, rng: &mut impl Rng) -> DMatrix<f64> {
    let mut t = x.clone();
    for i in 0..x.nrows() {
        let mut offset = 0.0;
        for j in 0..x.ncols() {
            if j % block == 0 {
                let z: f64 = StandardNormal.sample(rng);
                offset = spreads[i].shared * z;
            }
            let z: f64 = StandardNormal.sample(rng);
            t[(i, j)] = x[(i, j)] + offset + spreads[i].own * z;
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
    let params = RecoveryParams { rank: RankChoice::Fixed(fit.rank), ..fit.params.get().clone() }.check()?;
    let (sd, bounds) = (dither_sd(fit.profile), fit.profile.boundaries_kw());
    let taus: Vec<f64> = fit.spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let block = (BLOCK_S / fit.layout.interval_s.max(1)).max(1) as usize;
    let keep = (2 * fit.rank).min(m).min(n);
    let mut out = FitDraws::default();
    for _ in 0..draws {
        let t = drawn_loads(fit.x, fit.spreads, block, rng);
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
            .map(|c| SumConstraint { sum_kw: c.cols.clone().map(|j| t[(c.row, j)]).sum::<f64>().max(0.0), ..c.clone() })
            .collect();
        let warm = WarmStart { x: fit.x.clone(), rank: fit.rank };
        let again = recover_from(&lv, fit.profile, &reads, fit.layout, &params, Some(&warm), &mut |_, _| {})?;
        let shift = posterior(&again.x, &lv, &taus, sd, bounds) - posterior(fit.x, &lv, &taus, sd, bounds);
        out.shifts.push(truncate(&shift, keep, 6, 2, None, rng));
    }
    Ok(out)
}

impl FitDraws {
    /// The variance (kW²) the fit adds to the sum of `cells` (meter,
    /// interval): the mean over draws of the square of their summed shifts.
    /// That keeps the draws' mean shift (their drift) as well as their spread
    /// about it. On CREST households at σ 0.3 kW the drift is 99% of it and
    /// no real error matches it (bands over-cover); at σ 1.0 kW it is about
    /// half and needed: spread alone, groups of 10 covered 89%
    /// (`tests/bands_diagnosis.rs`).
    pub fn variance_of(&self, cells: &mut dyn Iterator<Item = (usize, usize)>) -> f64 {
        if self.shifts.is_empty() {
            return 0.0;
        }
        let mut sums = vec![0.0; self.shifts.len()];
        for (i, j) in cells {
            for (a, d) in sums.iter_mut().zip(&self.shifts) {
                *a += (0..d.rank()).map(|k| d.u[(i, k)] * d.s[k] * d.v[(j, k)]).sum::<f64>();
            }
        }
        sums.iter().map(|s| s * s).sum::<f64>() / self.shifts.len() as f64
    }

    /// Per interval, the variance the fit adds to the load of the meters `rows`.
    pub fn group_variances(&self, rows: &[usize], intervals: usize) -> Vec<f64> {
        (0..intervals).map(|j| self.variance_of(&mut rows.iter().map(|&i| (i, j)))).collect()
    }

    /// Per bucket, the variance the fit adds to one meter's sum over the
    /// bucket's intervals (`bucket[j]`: the bucket of interval j), beyond what
    /// the meter's own spread holds: the mean over draws of the square of the
    /// summed shifts, less the sum of their squares. A meter's spread is
    /// fitted to its levels around its recovered profile, so it already holds
    /// each of its intervals' own share of the profile's error; what it
    /// cannot hold is that error's agreement across the meter's intervals.
    /// (Across a group's meters at one interval the whole square is kept:
    /// less its diagonal, groups of 10 at σ 1.0 kW covered 88-89%.)
    pub fn bucket_variances(&self, row: usize, bucket: &[Option<usize>], buckets: usize) -> Vec<f64> {
        let mut sums = vec![vec![(0.0, 0.0); buckets]; self.shifts.len()];
        for (b, d) in self.shifts.iter().enumerate() {
            for (j, k) in bucket.iter().enumerate() {
                let Some(k) = k else { continue };
                let v: f64 = (0..d.rank()).map(|c| d.u[(row, c)] * d.s[c] * d.v[(j, c)]).sum();
                sums[b][*k].0 += v;
                sums[b][*k].1 += v * v;
            }
        }
        (0..buckets)
            .map(|k| (sums.iter().map(|s| s[k].0 * s[k].0 - s[k].1).sum::<f64>() / sums.len().max(1) as f64).max(0.0))
            .collect()
    }
}

/// A recovery's band model as stored beside it: each meter's spread (in the
/// meters' order of the fit) and the bootstrap's shifts.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct StoredBands {
    pub meters: Vec<String>,
    /// Per meter: shared, own, dispersion, day correlation, day offset.
    pub spreads: Vec<[f64; 5]>,
    pub draws: Vec<StoredDraw>,
}

/// One draw's shift, U · diag(s) · Vᵀ, with U and V row-major (rows × rank).
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct StoredDraw {
    pub s: Vec<f64>,
    pub u: Vec<f64>,
    pub v: Vec<f64>,
}

impl StoredBands {
    pub fn new(meters: Vec<String>, spreads: &[Spread], draws: &FitDraws) -> Self {
        let rows =
            |m: &DMatrix<f64>| (0..m.nrows()).flat_map(|i| m.row(i).iter().copied().collect::<Vec<_>>()).collect();
        StoredBands {
            meters,
            spreads: spreads.iter().map(|s| [s.shared, s.own, s.dispersion, s.day_correlation, s.day_offset]).collect(),
            draws: draws.shifts.iter().map(|d| StoredDraw { s: d.s.clone(), u: rows(&d.u), v: rows(&d.v) }).collect(),
        }
    }

    /// The spreads and draws back, checked against the fit they belong to
    /// (`intervals` columns).
    pub fn parts(&self, intervals: usize) -> Result<(Vec<Spread>, FitDraws), FieldError> {
        let m = self.meters.len();
        if self.spreads.len() != m {
            return Err(FieldError::new("spreads", "one per meter"));
        }
        let spreads = self
            .spreads
            .iter()
            .map(|a| Spread { shared: a[0], own: a[1], dispersion: a[2], day_correlation: a[3], day_offset: a[4] })
            .collect();
        let mut shifts = Vec::with_capacity(self.draws.len());
        for d in &self.draws {
            let r = d.s.len();
            if d.u.len() != m * r || d.v.len() != intervals * r {
                return Err(FieldError::new("draws", "factor sizes do not match the recovery"));
            }
            shifts.push(LowRank {
                u: DMatrix::from_row_slice(m, r, &d.u),
                s: d.s.clone(),
                v: DMatrix::from_row_slice(intervals, r, &d.v),
            });
        }
        Ok((spreads, FitDraws { shifts }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn random_draws(m: usize, n: usize, r: usize, draws: usize) -> FitDraws {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let mut g = || -> f64 { StandardNormal.sample(&mut rng) };
        FitDraws {
            shifts: (0..draws)
                .map(|_| LowRank {
                    u: DMatrix::from_fn(m, r, |_, _| g()),
                    s: (0..r).map(|k| 1.0 / (k + 1) as f64).collect(),
                    v: DMatrix::from_fn(n, r, |_, _| g()),
                })
                .collect(),
        }
    }

    /// The sums over factors equal the sums over the dense shifts.
    #[test]
    fn variances_match_the_dense_shifts() {
        let d = random_draws(7, 30, 3, 4);
        let dense: Vec<DMatrix<f64>> = d
            .shifts
            .iter()
            .map(|s| {
                let mut out = DMatrix::zeros(7, 30);
                s.reconstruct_into(&mut out);
                out
            })
            .collect();
        // Per draw the sum and the sum of squares of the picked cells.
        let picked = |cells: &dyn Fn(usize, usize) -> bool| -> Vec<(f64, f64)> {
            dense
                .iter()
                .map(|m| {
                    let v: Vec<f64> = (0..7)
                        .flat_map(|i| (0..30).map(move |j| (i, j)))
                        .filter(|&(i, j)| cells(i, j))
                        .map(|(i, j)| m[(i, j)])
                        .collect();
                    (v.iter().sum::<f64>(), v.iter().map(|x| x * x).sum::<f64>())
                })
                .collect()
        };
        let rows = [1, 4, 6];
        let group = d.group_variances(&rows, 30);
        for (j, v) in group.iter().enumerate() {
            let want = picked(&|i, jj| jj == j && rows.contains(&i)).iter().map(|(s, _)| s * s).sum::<f64>() / 4.0;
            assert!((v - want).abs() < 1e-9 * want.max(1.0), "interval {j}: {v} against {want}");
        }
        let bucket: Vec<Option<usize>> = (0..30).map(|j| (j % 7 != 0).then_some(j / 10)).collect();
        let sums = d.bucket_variances(2, &bucket, 3);
        assert!(sums.iter().any(|v| *v > 0.0), "{sums:?}");
        for (b, v) in sums.iter().enumerate() {
            let per = picked(&|i, j| i == 2 && bucket[j] == Some(b));
            let want = (per.iter().map(|(s, q)| s * s - q).sum::<f64>() / 4.0).max(0.0);
            assert!((v - want).abs() < 1e-9 * want.max(1.0), "bucket {b}: {v} against {want}");
        }
        assert_eq!(FitDraws::default().group_variances(&rows, 3), vec![0.0; 3]);
    }

    /// What a service stores comes back the same, and a mismatch is refused.
    #[test]
    fn stored_bands_come_back_whole() {
        let d = random_draws(3, 8, 2, 2);
        let spreads =
            vec![Spread { shared: 0.1, own: 0.2, dispersion: 1.5, day_correlation: 0.01, day_offset: 0.03 }; 3];
        let names = vec!["a".to_string(), "b".into(), "c".into()];
        let text = serde_json::to_string(&StoredBands::new(names, &spreads, &d)).unwrap();
        let back: StoredBands = serde_json::from_str(&text).unwrap();
        let (s2, d2) = back.parts(8).unwrap();
        assert_eq!(s2, spreads);
        // JSON keeps each number to its last digit or so.
        for (a, b) in d2.group_variances(&[0, 2], 8).iter().zip(d.group_variances(&[0, 2], 8)) {
            assert!((a - b).abs() <= 1e-12 * b.abs().max(1.0), "{a} against {b}");
        }
        assert_eq!(back.parts(9).unwrap_err().field, "draws");
    }
}
