//! Tabulated log-likelihood per level, for the hot loop.
//!
//! X is kept in [0, alpha] and there are only K levels, so log P(k | x) and its
//! derivative are smooth one-dimensional functions per level. We tabulate value,
//! first and second derivative on a grid of step s/128 and interpolate with cubic
//! Hermite polynomials: for the value from (f, f'), for the derivative from
//! (f', f''). Outside the grid the exact formula is used.

use crate::mechanism::log_likelihood;
use crate::profile::DitherProfile;

/// Grid points per unit of noise scale.
const PER_SCALE: f64 = 128.0;

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
