//! Recovery parameters: documented defaults, checked once.

use crate::error::FieldError;

/// The service limit's default, kW: estimates are kept in [0, alpha]. A
/// household's main fuse allows roughly this much (common practice: 60–80 A
/// single-phase at 230 V, from memory).
pub const DEFAULT_ALPHA_KW: f64 = 15.0;

/// How the rank is chosen.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum RankChoice {
    Fixed(usize),
    /// By held-out log-likelihood over this grid (ranks above min(m, n) are skipped).
    Auto(Vec<usize>),
}

#[derive(Debug, Clone, PartialEq)]
pub struct RecoveryParams {
    /// Default: automatic over 2, 5, 10, 20, 40.
    pub rank: RankChoice,
    /// Service limit, kW: estimates are kept in [0, alpha_kw]. Default 15.
    pub alpha_kw: f64,
    /// Default 300.
    pub max_iterations: usize,
    /// Stop when the relative change of the objective stays below this for 5 iterations. Default 1e-5.
    pub tolerance: f64,
    /// Fraction of observed entries held out to score ranks. Default 0.05.
    pub holdout_fraction: f64,
    /// Largest fraction of observed readings the sparse term may absorb. Default 0.05.
    pub max_corrupt_fraction: f64,
    /// Prior probability that a reading is corrupt (replaced by an arbitrary
    /// level). A reading is judged corrupt when that is the more probable
    /// explanation: P(y | estimate) < prior / (K (1 - prior)). Default 0.01.
    pub corrupt_prior: f64,
    /// Iterations per candidate rank when the rank is chosen automatically (the
    /// ranking settles long before convergence). Default 60.
    pub search_iterations: usize,
    /// Extra columns of the randomized SVD. Default 10.
    pub oversample: usize,
    /// Extra subspace-iteration rounds per truncation (the warm start already
    /// iterates the subspace from one step to the next). Default 0.
    pub power_iterations: usize,
    /// Seed of the randomized SVD and the hold-out draw (not dither). Default 7.
    pub seed: u64,
}

impl Default for RecoveryParams {
    fn default() -> Self {
        Self {
            rank: RankChoice::Auto(vec![2, 5, 10, 20, 40]),
            alpha_kw: DEFAULT_ALPHA_KW,
            max_iterations: 300,
            tolerance: 1e-5,
            holdout_fraction: 0.05,
            max_corrupt_fraction: 0.05,
            corrupt_prior: 0.01,
            search_iterations: 60,
            oversample: 10,
            power_iterations: 0,
            seed: 7,
        }
    }
}

/// Parameters that passed [`RecoveryParams::check`].
#[derive(Debug, Clone, PartialEq)]
pub struct ValidRecoveryParams(pub(crate) RecoveryParams);

impl ValidRecoveryParams {
    pub fn get(&self) -> &RecoveryParams {
        &self.0
    }
}

impl RecoveryParams {
    pub fn check(self) -> Result<ValidRecoveryParams, FieldError> {
        match &self.rank {
            RankChoice::Fixed(0) => return Err(FieldError::new("rank", "must be at least 1")),
            RankChoice::Auto(g) if g.is_empty() || g.contains(&0) => {
                return Err(FieldError::new(
                    "rank",
                    "the automatic grid must be non-empty and hold ranks of at least 1",
                ))
            }
            _ => {}
        }
        if !(self.alpha_kw.is_finite() && self.alpha_kw > 0.0 && self.alpha_kw <= 10_000.0) {
            return Err(FieldError::new(
                "alpha_kw",
                format!("{} must be a positive number of kW up to 10000", self.alpha_kw),
            ));
        }
        if self.max_iterations == 0 || self.max_iterations > 100_000 {
            return Err(FieldError::new("max_iterations", "must be between 1 and 100000"));
        }
        if !(self.tolerance.is_finite() && self.tolerance > 0.0) {
            return Err(FieldError::new("tolerance", "must be positive"));
        }
        if !(0.0..0.5).contains(&self.holdout_fraction) {
            return Err(FieldError::new("holdout_fraction", "must be in [0, 0.5)"));
        }
        if !(0.0..0.5).contains(&self.max_corrupt_fraction) {
            return Err(FieldError::new("max_corrupt_fraction", "must be in [0, 0.5)"));
        }
        if !(self.corrupt_prior > 0.0 && self.corrupt_prior < 0.5) {
            return Err(FieldError::new("corrupt_prior", "must be in (0, 0.5)"));
        }
        if self.search_iterations == 0 || self.search_iterations > 100_000 {
            return Err(FieldError::new("search_iterations", "must be between 1 and 100000"));
        }
        if self.oversample > 1000 || self.power_iterations > 20 {
            return Err(FieldError::new("oversample", "oversample ≤ 1000 and power_iterations ≤ 20"));
        }
        Ok(ValidRecoveryParams(self))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_bad_field_is_named() {
        let d = RecoveryParams::default;
        let cases = [
            (RecoveryParams { rank: RankChoice::Fixed(0), ..d() }, "rank"),
            (RecoveryParams { rank: RankChoice::Auto(vec![]), ..d() }, "rank"),
            (RecoveryParams { alpha_kw: 0.0, ..d() }, "alpha_kw"),
            (RecoveryParams { alpha_kw: f64::NAN, ..d() }, "alpha_kw"),
            (RecoveryParams { max_iterations: 0, ..d() }, "max_iterations"),
            (RecoveryParams { tolerance: -1.0, ..d() }, "tolerance"),
            (RecoveryParams { holdout_fraction: 0.7, ..d() }, "holdout_fraction"),
            (RecoveryParams { max_corrupt_fraction: 0.9, ..d() }, "max_corrupt_fraction"),
            (RecoveryParams { corrupt_prior: 0.0, ..d() }, "corrupt_prior"),
            (RecoveryParams { search_iterations: 0, ..d() }, "search_iterations"),
            (RecoveryParams { oversample: 5000, ..d() }, "oversample"),
        ];
        for (p, field) in cases {
            assert_eq!(p.check().unwrap_err().field, field);
        }
        assert!(RecoveryParams::default().check().is_ok());
    }
}
