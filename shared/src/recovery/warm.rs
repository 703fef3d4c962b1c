//! Warm starts: a recovery of a window that mostly overlaps an earlier one
//! (the next settlement day's trailing window) starts from the earlier
//! estimates at the earlier rank, skips the rank search and converges in a
//! fraction of a cold fit's iterations.

use nalgebra::DMatrix;

/// Where a fit starts: estimates (kW) of every meter and interval of the new
/// window, and the rank to fit at.
#[derive(Debug, Clone)]
pub struct WarmStart {
    pub x: DMatrix<f64>,
    pub rank: usize,
}

impl WarmStart {
    /// The start for a window moved `shift` intervals later than the one `prev`
    /// (meters × intervals, same meters in the same order) estimated: the
    /// overlap is carried over, and each new interval takes the estimate of the
    /// interval `period` earlier (a week of intervals for load profiles), or
    /// the last carried-over interval when the window is shorter than that.
    pub fn shifted(prev: &DMatrix<f64>, rank: usize, shift: usize, period: usize) -> Self {
        let (m, n) = prev.shape();
        let mut x = DMatrix::zeros(m, n);
        let kept = n.saturating_sub(shift);
        for j in 0..n {
            let src = if j < kept {
                Some(j + shift)
            } else if period > 0 && j >= period {
                None
            } else {
                Some(n - 1)
            };
            match src {
                Some(s) => x.set_column(j, &prev.column(s)),
                None => {
                    let c = x.column(j - period).clone_owned();
                    x.set_column(j, &c);
                }
            }
        }
        Self { x, rank }
    }

    /// A start from estimates with gaps (NaN): each column with no estimate at
    /// all (a new day) takes the column `period` earlier where that has some;
    /// the entries still missing take the cold start's value in
    /// [`super::recover_from`].
    pub fn from_partial(mut x: DMatrix<f64>, rank: usize, period: usize) -> Self {
        for j in 0..x.ncols() {
            if period > 0 && j >= period && x.column(j).iter().all(|v| !v.is_finite()) {
                let c = x.column(j - period).clone_owned();
                x.set_column(j, &c);
            }
        }
        Self { x, rank }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_shift_carries_the_overlap_and_fills_new_intervals_a_period_back() {
        // 2 meters × 10 intervals, value = 100·row + column.
        let prev = DMatrix::from_fn(2, 10, |i, j| (100 * i + j) as f64);
        let w = WarmStart::shifted(&prev, 3, 2, 4);
        assert_eq!(w.rank, 3);
        // Columns 0..8 are the old 2..10.
        for j in 0..8 {
            assert_eq!(w.x[(1, j)], (100 + j + 2) as f64);
        }
        // New columns 8 and 9 repeat columns 4 and 5 (one period back).
        assert_eq!(w.x[(0, 8)], w.x[(0, 4)]);
        assert_eq!(w.x[(1, 9)], w.x[(1, 5)]);
        // A period longer than the window falls back to the last kept column.
        let w = WarmStart::shifted(&prev, 3, 2, 40);
        assert_eq!(w.x[(0, 9)], 9.0);
        // Gaps: a whole new column repeats the one a period back; single gaps stay for the cold start.
        let mut part = DMatrix::from_element(2, 6, f64::NAN);
        part[(0, 0)] = 1.0;
        part[(1, 0)] = 2.0;
        part[(0, 1)] = 3.0;
        let w = WarmStart::from_partial(part, 2, 4);
        assert_eq!((w.x[(0, 4)], w.x[(1, 4)], w.x[(0, 5)]), (1.0, 2.0, 3.0));
        assert!(w.x[(1, 5)].is_nan() && w.x[(0, 2)].is_nan());
    }
}
