//! Tabulated log-likelihood per level, for the hot loop.
//!
//! X is kept in [0, alpha] and there are only K levels, so log P(k | x) and its
//! derivative are smooth one-dimensional functions per level. We tabulate value,
//! first and second derivative on a grid of step s/128 and interpolate with cubic
//! Hermite polynomials: for the value from (f, f'), for the derivative from
//! (f', f''). Outside the grid the exact formula is used.

use crate::error::FieldError;
use crate::mechanism::log_likelihood;
use crate::profile::DitherProfile;

/// Grid points per unit of noise scale.
const PER_SCALE: f64 = 128.0;

/// Largest table a fit may build: 512 MiB. The grid has 128 nodes per unit of
/// the dither scale over about twice the service limit, per level, so a small
/// scale with a large limit (0.001 kW with 10,000 kW: about 2.6 × 10⁹ nodes per
/// level) would otherwise ask for terabytes. Our choice; 15 kW at the smallest
/// scale, 0.001 kW, with 3 levels needs 264 MiB.
pub const MAX_TABLE_BYTES: usize = 512 << 20;

/// The range a fit with service limit `alpha` tabulates: [-α/2 - 5s, 3α/2 + 5s].
fn fit_range(profile: &DitherProfile, alpha: f64) -> (f64, f64) {
    let s = profile.scale_kw();
    (-0.5 * alpha - 5.0 * s, 1.5 * alpha + 5.0 * s)
}

/// Bytes of the table a fit with service limit `alpha_kw` builds.
pub fn fit_table_bytes(profile: &DitherProfile, alpha_kw: f64) -> f64 {
    let (lo, hi) = fit_range(profile, alpha_kw);
    let nodes = (hi - lo) / (profile.scale_kw() / PER_SCALE) + 2.0;
    nodes * profile.levels() as f64 * std::mem::size_of::<[f64; 3]>() as f64
}

/// Refuses a service limit whose table would exceed [`MAX_TABLE_BYTES`].
pub fn check_table_size(profile: &DitherProfile, alpha_kw: f64) -> Result<(), FieldError> {
    let bytes = fit_table_bytes(profile, alpha_kw);
    if !bytes.is_finite() || bytes > MAX_TABLE_BYTES as f64 {
        let most = alpha_kw * MAX_TABLE_BYTES as f64 / bytes;
        return Err(FieldError::new(
            "alpha_kw",
            format!(
                "{alpha_kw} kW with a dither scale of {} kW and {} levels needs a {:.0} MiB likelihood table; \
                 at most {} MiB are allowed, so at this scale alpha_kw can be at most about {most:.0} kW",
                profile.scale_kw(),
                profile.levels(),
                bytes / 1_048_576.0,
                MAX_TABLE_BYTES >> 20
            ),
        ));
    }
    Ok(())
}

#[derive(Debug, Clone)]
pub struct LikelihoodTable {
    profile: DitherProfile,
    lo: f64,
    hi: f64,
    h: f64,
    inv_h: f64,
    nodes: usize,
    /// Per level, per node: (f, f', f'') of log P(k | x).
    data: Vec<[f64; 3]>,
}

impl LikelihoodTable {
    /// Tabulates over [lo, hi] kW (the iterate's range plus a margin).
    pub fn new(profile: &DitherProfile, lo: f64, hi: f64) -> Self {
        let s = profile.scale_kw();
        let h = s / PER_SCALE;
        let nodes = (((hi - lo) / h).ceil() as usize).max(1) + 1;
        let k = profile.levels();
        let mut data = Vec::with_capacity(k * nodes);
        let eps = 1e-4 * s;
        for level in 0..k as u8 {
            for i in 0..nodes {
                let x = lo + i as f64 * h;
                let (f, d) = log_likelihood(profile, level, x);
                let dp = log_likelihood(profile, level, x + eps).1;
                let dm = log_likelihood(profile, level, x - eps).1;
                data.push([f, d, (dp - dm) / (2.0 * eps)]);
            }
        }
        Self { profile: profile.clone(), lo, hi: lo + (nodes - 1) as f64 * h, h, inv_h: 1.0 / h, nodes, data }
    }

    /// The table a fit with service limit `alpha_kw` uses, refused (naming
    /// `alpha_kw`) when it would exceed [`MAX_TABLE_BYTES`].
    pub fn for_fit(profile: &DitherProfile, alpha_kw: f64) -> Result<Self, FieldError> {
        check_table_size(profile, alpha_kw)?;
        let (lo, hi) = fit_range(profile, alpha_kw);
        Ok(Self::new(profile, lo, hi))
    }

    pub fn profile(&self) -> &DitherProfile {
        &self.profile
    }

    /// (log P(level | x), d/dx log P).
    #[inline]
    pub fn eval(&self, level: u8, x: f64) -> (f64, f64) {
        if !(x >= self.lo && x < self.hi) {
            return log_likelihood(&self.profile, level, x);
        }
        let u = (x - self.lo) * self.inv_h;
        let i = (u as usize).min(self.nodes - 2);
        let t = u - i as f64;
        let base = usize::from(level) * self.nodes + i;
        let (a, b) = (self.data[base], self.data[base + 1]);
        let h = self.h;
        let t2 = t * t;
        let t3 = t2 * t;
        let h00 = 2.0 * t3 - 3.0 * t2 + 1.0;
        let h10 = t3 - 2.0 * t2 + t;
        let h01 = -2.0 * t3 + 3.0 * t2;
        let h11 = t3 - t2;
        let f = h00 * a[0] + h10 * h * a[1] + h01 * b[0] + h11 * h * b[1];
        let d = h00 * a[1] + h10 * h * a[2] + h01 * b[1] + h11 * h * b[2];
        (f, d)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::profile::DitherProfileSpec;

    #[test]
    fn a_fit_table_is_bounded_and_the_error_names_alpha() {
        let p = |scale_kw: f64| {
            DitherProfile::try_from(DitherProfileSpec {
                noise: "gaussian".into(),
                scale_kw,
                boundaries_kw: vec![1.0, 2.0],
                interval_s: 900,
                send_registers: false,
                register_period: None,
            })
            .unwrap()
        };
        // 15 kW at the smallest scale: about 264 MiB, allowed.
        let mib = fit_table_bytes(&p(0.001), 15.0) / 1_048_576.0;
        assert!((mib - 264.0).abs() < 1.0, "{mib}");
        assert!(check_table_size(&p(0.001), 15.0).is_ok());
        // 10,000 kW at 0.001 kW would need about 172 GiB.
        let e = LikelihoodTable::for_fit(&p(0.001), 10_000.0).unwrap_err();
        assert_eq!(e.field, "alpha_kw");
        assert!(e.reason.contains("at most about 29 kW"), "{}", e.reason);
        assert!(check_table_size(&p(0.3), 10_000.0).is_err());
        assert!(check_table_size(&p(0.3), 5_000.0).is_ok());
    }

    #[test]
    fn matches_the_exact_formula() {
        for (noise, s, b) in [
            ("gaussian", 0.3, vec![1.0, 2.0]),
            ("logistic", 0.1, vec![0.5, 1.0, 2.0, 4.0]),
            ("gaussian", 1.0, vec![1.0]),
        ] {
            let p = DitherProfile::try_from(DitherProfileSpec {
                noise: noise.into(),
                scale_kw: s,
                boundaries_kw: b,
                interval_s: 900,
                send_registers: false,
                register_period: None,
            })
            .unwrap();
            let t = LikelihoodTable::new(&p, -0.5, 15.5);
            let mut worst = (0.0f64, 0.0f64);
            for level in 0..p.levels() as u8 {
                for i in 0..20_000 {
                    let x = -0.4 + 15.8 * (i as f64 + 0.37) / 20_000.0;
                    let (f, d) = t.eval(level, x);
                    let (fe, de) = log_likelihood(&p, level, x);
                    worst.0 = worst.0.max((f - fe).abs() / fe.abs().max(1.0));
                    worst.1 = worst.1.max((d - de).abs() / de.abs().max(1.0 / s));
                }
            }
            assert!(worst.0 < 1e-9 && worst.1 < 1e-7, "{noise} s={s}: worst rel error {worst:?}");
        }
    }
}
