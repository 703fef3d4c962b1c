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
        crate::domain::utc_weekday(t)
    }
}

/// Day types as in the BDEW standard load profiles: 0 working day, 1 Saturday, 2 Sunday.
fn day_kind(weekday: u32) -> usize {
    match weekday {
        5 => 1,
        6 => 2,
        _ => 0,
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

/// Rank of the folded residual model.
const DAY_RANK: usize = 4;
const EM_ROUNDS: usize = 40;

/// Fills outage columns of `x` from the meters' own days. Returns the number of
/// outage columns.
///
/// Model: a meter's day is its like-day mean L (the mean over the window's days of
/// the same type, working day, Saturday or Sunday as in the BDEW profiles, at that
/// interval of day) plus a residual.
/// Folded into (meter, day) × interval-of-day, the residuals of the population are
/// close to low rank (a cold day, a late day), so the residual inside a gap is
/// completed by low-rank EM from the rest of that day, then anchored to the
/// estimates either side of the gap by a linear correction, so the fill meets its
/// neighbours without a step.
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
    let col_of = |d: usize, t: usize| (d * per_day + t).checked_sub(phase).filter(|j| *j < n);
    let day_type = |d: usize| day_kind(layout.weekday((d * per_day).saturating_sub(phase).min(n - 1)));
    // Like-day means per meter, day class and interval of day.
    let mut like = vec![[0.0f64; 3]; m * per_day];
    for i in 0..m {
        for t in 0..per_day {
            let mut acc = [(0.0, 0usize); 3];
            for d in 0..days {
                if let Some(j) = col_of(d, t) {
                    if !is_gap[j] {
                        let c = day_type(d);
                        acc[c].0 += x[(i, j)];
                        acc[c].1 += 1;
                    }
                }
            }
            let all = acc.iter().map(|a| a.0).sum::<f64>() / acc.iter().map(|a| a.1).sum::<usize>().max(1) as f64;
            for c in 0..3 {
                like[i * per_day + t][c] = if acc[c].1 > 0 { acc[c].0 / acc[c].1 as f64 } else { all };
            }
        }
    }
    let base = |i: usize, d: usize, t: usize| like[i * per_day + t][day_type(d)];
    // Folded residuals; unknowns start at zero.
    let rows = m * days;
    let mut f = DMatrix::<f64>::zeros(rows, per_day);
    let mut known = vec![false; rows * per_day];
    for i in 0..m {
        for d in 0..days {
            for t in 0..per_day {
                if let Some(j) = col_of(d, t) {
                    if !is_gap[j] {
                        f[(i * days + d, t)] = x[(i, j)] - base(i, d, t);
                        known[(i * days + d) + t * rows] = true;
                    }
                }
            }
        }
    }
    let fit = complete_low_rank(&mut f, &known);
    let value = |i: usize, j: usize, f: &DMatrix<f64>| {
        let (d, t) = ((j + phase) / per_day, (j + phase) % per_day);
        base(i, d, t) + f[(i * days + d, t)]
    };
    for &(a, b) in &runs {
        for i in 0..m {
            // Mismatch of the model at the estimates just outside the gap.
            let left = if a > 0 { x[(i, a - 1)] - value(i, a - 1, &fit) } else { 0.0 };
            let right = if b < n { x[(i, b)] - value(i, b, &fit) } else { left };
            let left = if a > 0 { left } else { right };
            let len = (b - a + 1) as f64;
            for j in a..b {
                let w = (j + 1 - a) as f64 / len;
                x[(i, j)] = value(i, j, &f) + left + w * (right - left);
            }
        }
    }
    gap_cols
}

/// Low-rank EM on the folded residuals `f`: the unknown entries (not `known`,
/// column-major) are replaced by a rank-[`DAY_RANK`] fit, [`EM_ROUNDS`] times.
/// Returns the last fit.
fn complete_low_rank(f: &mut DMatrix<f64>, known: &[bool]) -> DMatrix<f64> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
    let mut fit = DMatrix::zeros(f.nrows(), f.ncols());
    let mut warm = None;
    for _ in 0..EM_ROUNDS {
        let lr = truncate(f, DAY_RANK, 6, 1, warm.as_ref(), &mut rng);
        lr.reconstruct_into(&mut fit);
        for (idx, v) in f.as_mut_slice().iter_mut().enumerate() {
            if !known[idx] {
                *v = fit.as_slice()[idx];
            }
        }
        warm = Some(lr.v);
    }
    fit
}

/// The usual estimation rule of VEE practice, for comparison: gaps of up to
/// `short_max` intervals are filled by linear interpolation between the readings
/// either side; longer gaps by the average of like days (same day type: working
/// day, Saturday, Sunday) at the same interval of day. This is common practice in
/// utility VEE (validation, estimation and editing), stated here from memory of
/// utility VEE guidelines, not from one published source.
pub fn vee_rule_fill(x: &mut DMatrix<f64>, runs: &[(usize, usize)], layout: DayLayout, short_max: usize) {
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
                let kind = day_kind(layout.weekday(j));
                let (mut s, mut c) = (0.0, 0usize);
                let mut k = j % per_day;
                while k < n {
                    if !is_gap[k] && day_kind(layout.weekday(k)) == kind {
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
