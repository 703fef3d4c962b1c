//! The privacy mechanism, used identically by the gateway (to make levels) and the
//! service (to reason about them).
//!
//! With reading x (average kW over the interval), dither e ~ F(·/s) and boundaries
//! b_1 < … < b_{K-1}, the level is y = #{k : b_k <= x + e}. Given x,
//! P(y = k | x) = F((b_{k+1} - x)/s) - F((b_k - x)/s), with b_0 = -inf, b_K = +inf.

use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

use crate::profile::{DitherProfile, NoiseFamily};
use crate::special::{log1m_exp, log_logistic_cdf, log_logistic_pdf, log_ndtr, log_npdf};

/// Draws one dither value in kW from the profile's noise family.
///
/// Production callers pass an OS-seeded cryptographic generator (see
/// [`secure_rng`]); tests pass a seeded one.
pub fn draw_dither_kw(profile: &DitherProfile, rng: &mut impl Rng) -> f64 {
    profile.scale_kw() * standard_draw(profile.noise(), rng)
}

/// One draw of the noise family at unit scale.
pub fn standard_draw(noise: NoiseFamily, rng: &mut impl Rng) -> f64 {
    match noise {
        NoiseFamily::Gaussian => StandardNormal.sample(rng),
        NoiseFamily::Logistic => {
            // Inverse CDF on the open interval (0, 1): u = 0 would give -inf.
            let u: f64 = loop {
                let u: f64 = rng.random();
                if u > 0.0 {
                    break u;
                }
            };
            (u / (1.0 - u)).ln()
        }
    }
}

/// Level for a dithered value: the number of boundaries at or below it.
pub fn level_of(profile: &DitherProfile, dithered_kw: f64) -> u8 {
    // boundaries are strictly increasing: partition_point counts b <= v.
    let k = profile.boundaries_kw().partition_point(|b| *b <= dithered_kw);
    // At most 63 boundaries (validated), so k fits a u8.
    k as u8
}

/// Dithers and quantizes one reading. Only the returned level may leave the gateway.
pub fn dither_and_quantize(profile: &DitherProfile, reading_kw: f64, rng: &mut impl Rng) -> u8 {
    level_of(profile, reading_kw + draw_dither_kw(profile, rng))
}

/// The generator the gateway uses in production: ChaCha12 seeded from the
/// operating system's secure source, reseeding as rand's `StdRng` documents.
pub fn secure_rng() -> rand::rngs::StdRng {
    use rand::SeedableRng;
    rand::rngs::StdRng::from_os_rng()
}

/// log P(y = level | x) and its derivative in x (per kW).
///
/// Stable for standardized distances |b - x|/s of several hundred: no underflow to
/// `-inf`, no NaN. `level` must be below `profile.levels()`; out-of-range levels
/// return `(-inf, 0)` rather than panicking.
pub fn log_likelihood(profile: &DitherProfile, level: u8, x_kw: f64) -> (f64, f64) {
    let b = profile.boundaries_kw();
    let k = usize::from(level);
    if k > b.len() {
        return (f64::NEG_INFINITY, 0.0);
    }
    let s = profile.scale_kw();
    let lower = if k == 0 { None } else { Some((b[k - 1] - x_kw) / s) };
    let upper = if k == b.len() { None } else { Some((b[k] - x_kw) / s) };
    let fam = Family(profile.noise());
    let log_p = fam.log_interval(lower, upper);
    // d/dx [F(zb) - F(za)] = (f(za) - f(zb)) / s, since dz/dx = -1/s.
    let term = |z: Option<f64>| z.map_or(0.0, |z| (fam.log_pdf(z) - log_p).exp());
    let dlog_p = (term(lower) - term(upper)) / s;
    (log_p, dlog_p)
}

/// Upper bound on -d²/dx² log P(y | x) over all levels and x, in 1/kW².
///
/// For a location family with density e^-φ, -d² log P(interval)/dθ² ≤ sup φ''
/// (the interval probability of a log-concave density is log-concave with no more
/// curvature than the density): 1 for the standard normal, 1/2 for the standard
/// logistic (φ'' = 2f ≤ 1/2). Divided by s² for scale s. The gradient step is its inverse.
pub fn max_curvature(profile: &DitherProfile) -> f64 {
    let s2 = profile.scale_kw() * profile.scale_kw();
    match profile.noise() {
        NoiseFamily::Gaussian => 1.0 / s2,
        NoiseFamily::Logistic => 0.5 / s2,
    }
}

/// P(y = level | x), the mechanism's probability (not in log space; for tests and
/// Monte Carlo where the values are moderate).
pub fn level_probability(profile: &DitherProfile, level: u8, x_kw: f64) -> f64 {
    log_likelihood(profile, level, x_kw).0.exp()
}

/// Standardized-CDF helpers for one noise family.
#[derive(Clone, Copy)]
struct Family(NoiseFamily);

impl Family {
    fn log_cdf(self, z: f64) -> f64 {
        match self.0 {
            NoiseFamily::Gaussian => log_ndtr(z),
            NoiseFamily::Logistic => log_logistic_cdf(z),
        }
    }
    /// ln(1 - F(z)); both families are symmetric.
    fn log_sf(self, z: f64) -> f64 {
        self.log_cdf(-z)
    }
    fn log_pdf(self, z: f64) -> f64 {
        match self.0 {
            NoiseFamily::Gaussian => log_npdf(z),
            NoiseFamily::Logistic => log_logistic_pdf(z),
        }
    }

    /// ln(F(zb) - F(za)) for za < zb, either end possibly infinite (`None`).
    fn log_interval(self, za: Option<f64>, zb: Option<f64>) -> f64 {
        match (za, zb) {
            (None, None) => 0.0,
            (None, Some(zb)) => self.log_cdf(zb),
            (Some(za), None) => self.log_sf(za),
            (Some(za), Some(zb)) => {
                let width = zb - za;
                if width < 1e-8 {
                    // Too narrow for the difference formula: midpoint rule.
                    return self.log_pdf(0.5 * (za + zb)) + width.ln();
                }
                if za + zb > 0.0 {
                    // Mostly in the upper tail: subtract survival functions.
                    let (hi, lo) = (self.log_sf(za), self.log_sf(zb));
                    hi + log1m_exp(lo - hi)
                } else {
                    let (hi, lo) = (self.log_cdf(zb), self.log_cdf(za));
                    hi + log1m_exp(lo - hi)
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use rand::SeedableRng;

    use crate::profile::test_profile as profile;

    #[test]
    fn probabilities_sum_to_one() {
        for noise in ["gaussian", "logistic"] {
            let p = profile(noise, 0.3, &[1.0, 2.0, 3.5]);
            for &x in &[-1.0, 0.0, 0.7, 1.5, 2.0, 4.0, 12.0] {
                let total: f64 = (0..p.levels() as u8).map(|k| level_probability(&p, k, x)).sum();
                assert!((total - 1.0).abs() < 1e-12, "{noise} x={x}: {total}");
            }
        }
    }

    #[test]
    fn far_tails_are_finite() {
        for noise in ["gaussian", "logistic"] {
            let p = profile(noise, 0.01, &[1.0, 2.0]);
            // |z| up to 500 for every level.
            for &x in &[-3.0, 1.5, 7.0] {
                for k in 0..3u8 {
                    let (l, d) = log_likelihood(&p, k, x);
                    assert!(l.is_finite() && d.is_finite(), "{noise} k={k} x={x}: {l} {d}");
                    assert!(l <= 0.0);
                }
            }
        }
    }

    #[test]
    fn out_of_range_level_does_not_panic() {
        let p = profile("gaussian", 0.3, &[1.0]);
        assert_eq!(log_likelihood(&p, 5, 1.0).0, f64::NEG_INFINITY);
    }

    #[test]
    fn level_counts_boundaries_at_or_below() {
        let p = profile("gaussian", 0.3, &[1.0, 2.0]);
        assert_eq!(level_of(&p, 0.999), 0);
        assert_eq!(level_of(&p, 1.0), 1);
        assert_eq!(level_of(&p, 2.5), 2);
    }

    #[test]
    fn dither_is_zero_mean_with_the_stated_spread() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        for (noise, sd_factor) in [("gaussian", 1.0), ("logistic", std::f64::consts::PI / 3f64.sqrt())] {
            let p = profile(noise, 0.5, &[1.0]);
            let n = 200_000;
            let draws: Vec<f64> = (0..n).map(|_| draw_dither_kw(&p, &mut rng)).collect();
            let mean = draws.iter().sum::<f64>() / n as f64;
            let var = draws.iter().map(|d| (d - mean).powi(2)).sum::<f64>() / n as f64;
            let sd = 0.5 * sd_factor;
            // Standard error of the mean is sd/sqrt(n) ≈ 0.002: allow 5 of them.
            assert!(mean.abs() < 5.0 * sd / (n as f64).sqrt(), "{noise} mean {mean}");
            assert!((var.sqrt() / sd - 1.0).abs() < 0.01, "{noise} sd {}", var.sqrt());
        }
    }

    /// Upper critical values of the chi-square distribution at significance 0.001,
    /// from the NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.4
    /// (df 2: 13.816, df 3: 16.266, df 7: 24.322).
    fn chi2_critical_001(df: usize) -> f64 {
        match df {
            2 => 13.816,
            3 => 16.266,
            7 => 24.322,
            _ => panic!("no table value for df={df}"),
        }
    }

    #[test]
    fn empirical_levels_match_mechanism_chi_square() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2026);
        let n = 100_000usize;
        let cases = [
            ("gaussian", 0.3, vec![1.0, 2.0], 1.3),
            ("logistic", 0.3, vec![1.0, 2.0], 1.3),
            ("gaussian", 0.6, vec![0.5, 1.0, 2.0], 0.8),
            ("logistic", 0.1, (1..=7).map(|i| f64::from(i) * 0.5).collect(), 2.2),
        ];
        for (noise, s, b, x) in cases {
            let p = profile(noise, s, &b);
            let k = p.levels();
            let mut counts = vec![0usize; k];
            for _ in 0..n {
                counts[usize::from(dither_and_quantize(&p, x, &mut rng))] += 1;
            }
            let mut chi2 = 0.0;
            for (lvl, &c) in counts.iter().enumerate() {
                let expected = n as f64 * level_probability(&p, lvl as u8, x);
                if expected > 0.0 {
                    chi2 += (c as f64 - expected).powi(2) / expected;
                } else {
                    assert_eq!(c, 0);
                }
            }
            let crit = chi2_critical_001(k - 1);
            assert!(chi2 < crit, "{noise} s={s} x={x}: chi2 {chi2:.2} >= {crit} ({counts:?})");
        }
    }

    #[test]
    fn wrong_mechanism_fails_the_chi_square() {
        // The check can fail: levels drawn at x = 1.3 are tested against x = 1.4.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let p = profile("gaussian", 0.3, &[1.0, 2.0]);
        let n = 100_000;
        let mut counts = [0usize; 3];
        for _ in 0..n {
            counts[usize::from(dither_and_quantize(&p, 1.3, &mut rng))] += 1;
        }
        let chi2: f64 = (0..3)
            .map(|l| {
                let e = n as f64 * level_probability(&p, l as u8, 1.4);
                (counts[l] as f64 - e).powi(2) / e
            })
            .sum();
        assert!(chi2 > chi2_critical_001(2));
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]
        #[test]
        fn derivative_matches_finite_difference(
            x in -2.0f64..6.0,
            s in 0.05f64..2.0,
            level in 0u8..4,
            logistic in any::<bool>(),
        ) {
            let p = profile(if logistic { "logistic" } else { "gaussian" }, s, &[0.5, 1.5, 3.0]);
            let h = 1e-5 * s;
            let (_, d) = log_likelihood(&p, level, x);
            let fd = (log_likelihood(&p, level, x + h).0 - log_likelihood(&p, level, x - h).0) / (2.0 * h);
            prop_assert!((d - fd).abs() <= 1e-5 * (1.0 + d.abs()), "d={} fd={}", d, fd);
        }
    }
}
