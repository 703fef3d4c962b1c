//! Group loads with an uncertainty band, from a recovery and the levels it was
//! fitted to.
//!
//! Each meter's true load at an interval is modelled as its recovered value
//! plus a spread of its own, gaussian with standard deviation τ (what the
//! population's low-rank shape does not hold: appliance events, absences).
//! τ is fitted per meter by maximum likelihood of its levels: a level then has
//! the probability of the recovered value plus spread plus dither landing in
//! its band. Given the level, the true load's mean and variance follow in
//! closed form (the dither is taken as gaussian of its own variance). A
//! group's load is the sum of its meters' means, and its variance the sum of
//! their variances: meters are taken as independent given the recovery.

use libm::erfc;
use nalgebra::DMatrix;

use crate::recovery::LevelMatrix;
use crate::{DitherProfile, NoiseFamily};

/// z of a two-sided 95% band.
pub const Z95: f64 = 1.959_963_984_540_054;

fn cdf(z: f64) -> f64 {
    0.5 * erfc(-z / std::f64::consts::SQRT_2)
}

fn pdf(z: f64) -> f64 {
    (-0.5 * z * z).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// The dither's standard deviation, kW (logistic: scale · π/√3).
pub fn dither_sd(p: &DitherProfile) -> f64 {
    match p.noise() {
        NoiseFamily::Gaussian => p.scale_kw(),
        NoiseFamily::Logistic => p.scale_kw() * std::f64::consts::PI / 3f64.sqrt(),
    }
}

/// The band (lower, upper boundary, kW) of `level`; infinite at the ends.
fn band(bounds: &[f64], level: u8) -> (f64, f64) {
    let l = usize::from(level);
    let lo = if l == 0 { f64::NEG_INFINITY } else { bounds[l - 1] };
    let hi = bounds.get(l).copied().unwrap_or(f64::INFINITY);
    (lo, hi)
}

/// ln P(level | recovered `xhat`, spread `tau`), floored so that one
/// impossible level cannot decide a meter's spread.
fn level_log_probability(xhat: f64, tau: f64, sd: f64, bounds: &[f64], level: u8) -> f64 {
    let s = (sd * sd + tau * tau).sqrt();
    let (lo, hi) = band(bounds, level);
    (cdf((hi - xhat) / s) - cdf((lo - xhat) / s)).max(1e-12).ln()
}

/// Mean and variance (kW, kW²) of the true load at one interval, given the
/// recovered value, the meter's spread and its level (`None`: no reading).
pub fn interval_moments(xhat: f64, tau: f64, sd: f64, bounds: &[f64], level: Option<u8>) -> (f64, f64) {
    let Some(level) = level else { return (xhat, tau * tau) };
    let v = sd * sd + tau * tau;
    let s = v.sqrt();
    let k = tau * tau / v;
    let (lo, hi) = band(bounds, level);
    let (a, b) = ((lo - xhat) / s, (hi - xhat) / s);
    let z = cdf(b) - cdf(a);
    if z < 1e-12 {
        // A level the model finds impossible: the nearer boundary is the best guess.
        let edge = if b <= 0.0 { hi } else { lo };
        return (xhat + k * (edge - xhat), tau * tau * sd * sd / v);
    }
    let (pa, pb) = (pdf(a), pdf(b));
    let (apa, bpb) = (if a.is_finite() { a * pa } else { 0.0 }, if b.is_finite() { b * pb } else { 0.0 });
    let ratio = (pa - pb) / z;
    // The sum (load + spread + dither) truncated to the level's band.
    let mean_sum = xhat + s * ratio;
    let var_sum = v * (1.0 + (apa - bpb) / z - ratio * ratio);
    (xhat + k * (mean_sum - xhat), tau * tau * sd * sd / v + k * k * var_sum.max(0.0))
}

/// Each meter's spread τ (kW): the value on a log grid from 0.01 to 10 kW (and
/// 0) that makes its levels most probable around its recovered profile.
pub fn meter_spreads(x: &DMatrix<f64>, levels: &LevelMatrix, profile: &DitherProfile) -> Vec<f64> {
    let sd = dither_sd(profile);
    let bounds = profile.boundaries_kw();
    let grid: Vec<f64> =
        std::iter::once(0.0).chain((0..=60).map(|i| 0.01 * 1000f64.powf(f64::from(i) / 60.0))).collect();
    (0..x.nrows())
        .map(|i| {
            let score = |tau: f64| -> f64 {
                (0..x.ncols())
                    .filter_map(|j| levels.get(i, j).map(|l| level_log_probability(x[(i, j)], tau, sd, bounds, l)))
                    .sum()
            };
            grid.iter().map(|&t| (score(t), t)).fold((f64::NEG_INFINITY, 0.0), |b, c| if c.0 > b.0 { c } else { b }).1
        })
        .collect()
}

/// Every interval's mean and variance of the true load (m × n each).
pub fn moments(
    x: &DMatrix<f64>,
    levels: &LevelMatrix,
    profile: &DitherProfile,
    spreads: &[f64],
) -> (DMatrix<f64>, DMatrix<f64>) {
    let sd = dither_sd(profile);
    let bounds = profile.boundaries_kw();
    let (m, n) = x.shape();
    let mut mean = DMatrix::zeros(m, n);
    let mut var = DMatrix::zeros(m, n);
    for j in 0..n {
        for i in 0..m {
            let (mu, v) = interval_moments(x[(i, j)], spreads[i], sd, bounds, levels.get(i, j));
            mean[(i, j)] = mu.max(0.0);
            var[(i, j)] = v;
        }
    }
    (mean, var)
}

/// One group's load per interval: (kW, lower, upper) of its 95% band.
pub fn group_load(mean: &DMatrix<f64>, var: &DMatrix<f64>, rows: &[usize]) -> Vec<(f64, f64, f64)> {
    (0..mean.ncols())
        .map(|j| {
            let kw: f64 = rows.iter().map(|&i| mean[(i, j)]).sum();
            let sd = rows.iter().map(|&i| var[(i, j)]).sum::<f64>().sqrt();
            (kw, (kw - Z95 * sd).max(0.0), kw + Z95 * sd)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn moments_follow_the_level() {
        let bounds = [1.0, 2.0];
        // No spread: the recovered value stands, whatever the level.
        assert_eq!(interval_moments(0.5, 0.0, 0.3, &bounds, Some(2)), (0.5, 0.0));
        // No reading: the recovered value with the spread's variance.
        let (mean, var) = interval_moments(0.5, 0.4, 0.3, &bounds, None);
        assert!(mean == 0.5 && (var - 0.16).abs() < 1e-12, "{mean} {var}");
        // A top level pulls the mean up, a bottom level down; the variance shrinks below τ².
        let (up, vu) = interval_moments(0.5, 1.0, 0.3, &bounds, Some(2));
        let (down, vd) = interval_moments(0.5, 1.0, 0.3, &bounds, Some(0));
        assert!(up > 1.5 && down < 0.5 && vu < 1.0 && vd < 1.0, "{up} {vu} {down} {vd}");
    }

    #[test]
    fn moments_match_a_simulation() {
        // Monte Carlo of load = x̂ + τ·z, level = band of load + dither: the
        // mean and variance of the load among draws at each level.
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let (xhat, tau, sd, bounds) = (0.8, 0.7, 0.3, [1.0, 2.0]);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let n01 = Normal::new(0.0, 1.0).unwrap();
        let mut acc = [(0.0f64, 0.0f64, 0usize); 3];
        for _ in 0..400_000 {
            let load = xhat + tau * n01.sample(&mut rng);
            let s = load + sd * n01.sample(&mut rng);
            let l = bounds.iter().filter(|b| s >= **b).count();
            acc[l].0 += load;
            acc[l].1 += load * load;
            acc[l].2 += 1;
        }
        for (l, (s1, s2, c)) in acc.iter().enumerate() {
            let mc_mean = s1 / *c as f64;
            let mc_var = s2 / *c as f64 - mc_mean * mc_mean;
            let (mean, var) = interval_moments(xhat, tau, sd, &bounds, Some(l as u8));
            assert!((mean - mc_mean).abs() < 0.01, "level {l}: mean {mean} against {mc_mean}");
            assert!((var - mc_var).abs() < 0.01, "level {l}: variance {var} against {mc_var}");
        }
    }
}
