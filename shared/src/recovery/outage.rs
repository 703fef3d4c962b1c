//! Whole-interval outages: intervals in which no meter of the window reported (a
//! concentrator or backhaul failure). A low-rank model across meters has nothing
//! to say about such a column, but each meter's own days do: folded into
//! (meter, day) × interval-of-day, the population's days are themselves close to
//! low rank, so the missing part of a day follows from the rest of that day.

use nalgebra::DMatrix;
use rand::SeedableRng;

use super::linalg::truncate;
use super::LevelMatrix;

/// How the window's columns map onto UTC days.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DayLayout {
    /// UTC epoch seconds of column 0.
    pub window_start: i64,
    /// Interval length, seconds (divides 86400).
    pub interval_s: u32,
}

impl DayLayout {
    pub fn per_day(&self) -> usize {
        (86_400 / self.interval_s.max(1)) as usize
    }
    /// Columns from the start of column 0's UTC day to column 0.
    pub fn phase(&self) -> usize {
        (self.window_start.rem_euclid(86_400) / i64::from(self.interval_s.max(1))) as usize
    }
    /// 0 = Monday … 6 = Sunday, for the UTC day of column `j`.
    pub fn weekday(&self, j: usize) -> u32 {
        let t = self.window_start + j as i64 * i64::from(self.interval_s);
        ((t.div_euclid(86_400) + 3).rem_euclid(7)) as u32
    }
}

/// Runs of consecutive columns with no reading at all, as (start, end) half-open.
pub fn outage_runs(levels: &LevelMatrix) -> Vec<(usize, usize)> {
    let (m, n) = (levels.rows(), levels.cols());
    let mut runs = Vec::new();
    if m == 0 {
        return runs;
    }
    let mut j = 0;
    while j < n {
        if (0..m).all(|i| levels.get(i, j).is_none()) {
            let s = j;
            while j < n && (0..m).all(|i| levels.get(i, j).is_none()) {
                j += 1;
            }
            runs.push((s, j));
        } else {
            j += 1;
        }
    }
    runs
}

/// Rank of the folded (meter, day) × interval-of-day model.
const DAY_RANK: usize = 8;
const EM_ROUNDS: usize = 60;

/// Fills outage columns of `x` from the day-folded low-rank model. Returns the
/// number of outage columns. Columns are filled only when at least one other day
/// of the window exists to learn from.
pub fn fill_outages(x: &mut DMatrix<f64>, levels: &LevelMatrix, layout: DayLayout) -> usize {
    let runs = outage_runs(levels);
    let gap_cols: usize = runs.iter().map(|(a, b)| b - a).sum();
    let (m, n) = x.shape();
    if gap_cols == 0 || gap_cols == n {
        return gap_cols;
    }
    let per_day = layout.per_day();
    let phase = layout.phase();
    let days = (phase + n).div_ceil(per_day);
    let mut is_gap = vec![false; n];
    for (a, b) in &runs {
        is_gap[*a..*b].iter_mut().for_each(|g| *g = true);
    }
    // Folded matrix: row = meter * days + day, column = interval of day.
    let rows = m * days;
    let col_of = |d: usize, t: usize| (d * per_day + t).checked_sub(phase).filter(|j| *j < n);
    let mut f = DMatrix::<f64>::zeros(rows, per_day);
    let mut known = vec![false; rows * per_day];
    for i in 0..m {
        for d in 0..days {
            for t in 0..per_day {
                if let Some(j) = col_of(d, t) {
                    if !is_gap[j] {
                        f[(i * days + d, t)] = x[(i, j)];
                        known[(i * days + d) + t * rows] = true;
                    }
                }
            }
        }
    }
    // Start unknowns at the meter's mean for that interval of day over its known days.
    for i in 0..m {
        for t in 0..per_day {
            let (mut s, mut c) = (0.0, 0usize);
            for d in 0..days {
                let r = i * days + d;
                if known[r + t * rows] {
                    s += f[(r, t)];
                    c += 1;
                }
            }
            let mean = if c > 0 { s / c as f64 } else { 0.0 };
            for d in 0..days {
                let r = i * days + d;
                if !known[r + t * rows] {
                    f[(r, t)] = mean;
                }
            }
        }
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let mut fit = DMatrix::zeros(rows, per_day);
    let mut warm = None;
    for _ in 0..EM_ROUNDS {
        let lr = truncate(&f, DAY_RANK, 6, 1, warm.as_ref(), &mut rng);
        lr.reconstruct_into(&mut fit);
        for (idx, v) in f.as_mut_slice().iter_mut().enumerate() {
            if !known[idx] {
                *v = fit.as_slice()[idx];
            }
        }
        warm = Some(lr.v);
    }
    for i in 0..m {
        for d in 0..days {
            for t in 0..per_day {
                if let Some(j) = col_of(d, t) {
                    if is_gap[j] {
                        x[(i, j)] = f[(i * days + d, t)];
                    }
                }
            }
        }
    }
    gap_cols
}

/// The usual estimation rule of VEE practice, for comparison: gaps of up to
/// `short_max` intervals are filled by linear interpolation between the readings
/// either side; longer gaps by the average of like days (same weekday class,
/// weekday or weekend) at the same interval of day. This is common practice in
/// utility VEE (validation, estimation and editing), stated here from memory of
/// utility VEE guidelines, not from one published source.
pub fn vee_rule_fill(
    x: &mut DMatrix<f64>,
    runs: &[(usize, usize)],
    layout: DayLayout,
    short_max: usize,
) {
    let (m, n) = x.shape();
    let per_day = layout.per_day();
    let mut is_gap = vec![false; n];
    for (a, b) in runs {
        is_gap[*a..*b].iter_mut().for_each(|g| *g = true);
    }
    for &(a, b) in runs {
        let len = b - a;
        for i in 0..m {
            if len <= short_max && a > 0 && b < n {
                let (l, r) = (x[(i, a - 1)], x[(i, b)]);
                for j in a..b {
                    let w = (j + 1 - a) as f64 / (len + 1) as f64;
                    x[(i, j)] = l + w * (r - l);
                }
                continue;
            }
            for j in a..b {
                let weekend = layout.weekday(j) >= 5;
                let (mut s, mut c) = (0.0, 0usize);
                let mut k = j % per_day;
                while k < n {
                    if !is_gap[k] && (layout.weekday(k) >= 5) == weekend {
                        s += x[(i, k)];
                        c += 1;
                    }
                    k += per_day;
                }
                if c > 0 {
                    x[(i, j)] = s / c as f64;
                }
            }
        }
    }
}
