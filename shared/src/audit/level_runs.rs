//! Run-length rules on the levels: an eavesdropper that knows nothing of the
//! mechanism's likelihood flags stretches of consecutive readings at the top
//! level. Under strong dither a single top-level reading is as likely noise as
//! load, while a run of them is a long large load: a washer, a heater, a car.

use nalgebra::DMatrix;

use crate::recovery::LevelMatrix;

/// Run lengths (readings) the rule may require.
pub const RUN_GRID: [f64; 8] = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0, 12.0];

/// Per reading, the length of the run of consecutive top-level readings that
/// holds it (0 for a reading below the top level or missing; a missing reading
/// ends a run).
pub fn top_level_runs(levels: &LevelMatrix, top: u8) -> DMatrix<f64> {
    let (k, n) = (levels.rows(), levels.cols());
    let mut out = DMatrix::zeros(k, n);
    for i in 0..k {
        let mut j = 0;
        while j < n {
            if levels.get(i, j) != Some(top) {
                j += 1;
                continue;
            }
            let start = j;
            while j < n && levels.get(i, j) == Some(top) {
                j += 1;
            }
            for c in start..j {
                out[(i, c)] = (j - start) as f64;
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_are_measured_and_broken_by_gaps() {
        let mut l = LevelMatrix::missing(1, 10);
        for (j, v) in [2, 2, 0, 2, 2, 2, 1, 2].iter().enumerate() {
            l.set(0, j, Some(*v));
        }
        // Column 8 missing, column 9 top: a run of one after the gap.
        l.set(0, 9, Some(2));
        let r = top_level_runs(&l, 2);
        assert_eq!(r.row(0).iter().copied().collect::<Vec<_>>(), vec![2., 2., 0., 3., 3., 3., 0., 1., 0., 1.]);
    }
}
