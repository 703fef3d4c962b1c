//! Maximum-likelihood low-rank recovery of load profiles from quantized levels.
//!
//! Maximise Σ_Ω log P(y_ij | X_ij) subject to rank(X) ≤ r and 0 ≤ X ≤ alpha (and,
//! where register reads exist, each meter-day's sum fixed), minus a sparse set of
//! readings judged corrupt. Projected gradient with Nesterov momentum; each step is
//! a randomized rank-r truncation warm-started from the previous subspace, then the
//! exact projection onto the box and the register constraints.

mod corrupt;
pub mod linalg;
pub mod outage;
pub mod params;
pub mod restarts;
pub mod solver;
pub mod start;
pub mod table;
pub mod warm;

pub use params::{RankChoice, RecoveryParams, ValidRecoveryParams, DEFAULT_ALPHA_KW};
pub use solver::{recover, recover_from, Diagnostics, Flag, ProgressFn, Recovery, Stop};
pub use warm::WarmStart;

/// Marks a missing entry in a [`LevelMatrix`].
pub const MISSING: u8 = u8::MAX;

/// Levels of a window, meters × intervals, column-major like nalgebra.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LevelMatrix {
    rows: usize,
    cols: usize,
    data: Vec<u8>,
}

impl LevelMatrix {
    /// An all-missing matrix.
    pub fn missing(rows: usize, cols: usize) -> Self {
        Self { rows, cols, data: vec![MISSING; rows * cols] }
    }

    pub fn rows(&self) -> usize {
        self.rows
    }
    pub fn cols(&self) -> usize {
        self.cols
    }

    #[inline]
    pub fn get(&self, i: usize, j: usize) -> Option<u8> {
        let v = self.data[i + j * self.rows];
        (v != MISSING).then_some(v)
    }

    #[inline]
    pub fn set(&mut self, i: usize, j: usize, level: Option<u8>) {
        self.data[i + j * self.rows] = level.unwrap_or(MISSING);
    }

    /// Raw column-major storage, `MISSING` for absent entries.
    pub fn as_slice(&self) -> &[u8] {
        &self.data
    }

    pub fn observed(&self) -> usize {
        self.data.iter().filter(|v| **v != MISSING).count()
    }
}

/// The sum of a meter's estimates over a run of intervals, fixed by register reads:
/// Σ_{j in cols} X[row, j] = `sum_kw` (energy in Wh = sum_kw · 1000 · interval hours).
#[derive(Debug, Clone, PartialEq)]
pub struct SumConstraint {
    pub row: usize,
    pub cols: std::ops::Range<usize>,
    pub sum_kw: f64,
}

impl SumConstraint {
    /// The constraint that a register advance of `wh` over `cols` (intervals of
    /// `interval_s` seconds) sets.
    pub fn from_wh(row: usize, cols: std::ops::Range<usize>, wh: f64, interval_s: u32) -> Self {
        let hours = f64::from(interval_s) / 3600.0;
        Self { row, cols, sum_kw: wh / (1000.0 * hours) }
    }
}

/// The 95% band x ± 1.96 sd of an estimate with standard deviation `sd`,
/// clipped to the service limit [0, alpha]; an unknown sd gives the whole range.
pub fn band95(x: f64, sd: f64, alpha: f64) -> (f64, f64) {
    if !sd.is_finite() {
        return (0.0, alpha);
    }
    ((x - 1.96 * sd).max(0.0), (x + 1.96 * sd).min(alpha))
}
