//! The recovery iteration.

use std::time::Instant;

use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rayon::prelude::*;
use serde::Serialize;

use super::linalg::{truncate, LowRank};
use super::restarts::RestartCounter;
pub use super::start::{conditional_means, initial_estimate, level_counts};
use super::table::LikelihoodTable;
use super::{outage, LevelMatrix, RankChoice, SumConstraint, ValidRecoveryParams, MISSING};
use crate::error::FieldError;
use crate::mechanism::max_curvature;
use crate::profile::DitherProfile;

/// Entries per parallel work item of the elementwise passes.
const CHUNK: usize = 1 << 15;

/// Quality of one recovered entry.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Flag {
    /// From its own quantized reading plus the population.
    Derived,
    /// No reading arrived; from the population (and, in outages, the meter's own days).
    Estimated,
    /// A reading arrived but was judged corrupt; replaced by the population's estimate.
    Corrected,
    /// A reading arrived that the population's low-rank shape does not hold
    /// (a genuine appliance event or absence, judged so because its meter has
    /// far more such readings than corruption at the prior rate would make):
    /// the reading is not judged wrong, but the fit leaves it out, so the
    /// interval's estimate is the population's.
    Atypical,
}

impl Flag {
    pub fn as_str(self) -> &'static str {
        match self {
            Flag::Derived => "derived",
            Flag::Estimated => "estimated",
            Flag::Corrected => "corrected",
            Flag::Atypical => "atypical",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Stop {
    Converged,
    MaxIterations,
    /// The objective stopped improving before the tolerance was met: the
    /// momentum restarted [`super::restarts::BARREN_RESTARTS`] times in a row with no gain
    /// between one restart and the next.
    Stalled,
    /// Nothing to fit (no rows, no columns or no readings).
    Empty,
}

#[derive(Debug, Clone, Serialize)]
pub struct Diagnostics {
    pub iterations: usize,
    /// Iterations spent choosing the rank (automatic rank only): with
    /// `iterations`, the fit's whole work in iterations.
    pub search_iterations: usize,
    /// The fit started from an earlier window's estimates ([`super::WarmStart`]).
    pub warm_start: bool,
    pub stop: Stop,
    /// Momentum restarts of the final fit (an overshooting step is retaken
    /// without momentum).
    pub restarts: usize,
    /// Mean log-likelihood per reading used in the final fit.
    pub log_likelihood_per_reading: f64,
    pub rank: usize,
    /// Held-out mean log-likelihood per rank tried (automatic rank only).
    pub rank_scores: Vec<(usize, f64)>,
    pub readings: usize,
    /// Readings judged corrupt (flag `corrected`).
    pub corrected: usize,
    /// Readings left out of the fit as loads its shape does not hold (flag `atypical`).
    pub atypical: usize,
    /// Intervals in which no meter reported, filled from the meters' own days.
    pub outage_intervals: usize,
    /// Register constraints that could not be met inside [0, alpha] (met as closely as possible).
    pub infeasible_constraints: usize,
    pub wall_s: f64,
}

/// The answer: estimates (kW), flags, and a standard deviation per entry (kW).
#[derive(Debug, Clone)]
pub struct Recovery {
    /// (m, n) estimates in kW.
    pub x: DMatrix<f64>,
    /// (m, n) column-major.
    pub flags: Vec<Flag>,
    /// (m, n) first-order standard deviation, kW (infinite where nothing informs the entry).
    pub std_kw: DMatrix<f64>,
    pub diagnostics: Diagnostics,
}

impl Recovery {
    pub fn flag(&self, i: usize, j: usize) -> Flag {
        self.flags[i + j * self.x.nrows()]
    }
}

/// Progress reports: (stage, fraction done of that stage).
pub type ProgressFn<'a> = &'a mut dyn FnMut(&str, f64);

/// Which observed entries the fit uses.
#[derive(Clone)]
pub(super) struct Mask {
    /// Column-major: true where the entry's level is used by the gradient.
    pub(super) active: Vec<bool>,
}

struct Fit {
    x: DMatrix<f64>,
    lr: LowRank,
    iterations: usize,
    stop: Stop,
    restarts: usize,
    objective: f64,
    /// Readings left out of the fit as implausible under it.
    excluded: Vec<bool>,
}

pub(super) struct Ctx<'a> {
    pub(super) levels: &'a LevelMatrix,
    pub(super) table: &'a LikelihoodTable,
    constraints: &'a [SumConstraint],
    alpha: f64,
    step: f64,
    pub(super) p: &'a super::RecoveryParams,
}

impl Ctx<'_> {
    /// Negative mean log-likelihood over active entries.
    fn objective(&self, x: &DMatrix<f64>, mask: &Mask) -> f64 {
        let lv = self.levels.as_slice();
        let (s, n) = x
            .as_slice()
            .par_chunks(CHUNK)
            .enumerate()
            .map(|(c, xs)| {
                let off = c * CHUNK;
                let (mut s, mut n) = (0.0, 0usize);
                for (k, &xv) in xs.iter().enumerate() {
                    if mask.active[off + k] {
                        s -= self.table.eval(lv[off + k], xv).0;
                        n += 1;
                    }
                }
                (s, n)
            })
            .reduce(|| (0.0, 0), |a, b| (a.0 + b.0, a.1 + b.1));
        if n == 0 {
            0.0
        } else {
            s / n as f64
        }
    }

    /// w = z + step · ∇ log-likelihood(z), over active entries.
    /// w = z + step · ∇ log-likelihood(z) over active entries, where
    /// z = x + beta (x - x_prev) is formed on the fly (one pass, no buffer for z).
    fn ascent(&self, x: &DMatrix<f64>, x_prev: &DMatrix<f64>, beta: f64, mask: &Mask, w: &mut DMatrix<f64>) {
        let lv = self.levels.as_slice();
        let step = self.step;
        w.as_mut_slice()
            .par_chunks_mut(CHUNK)
            .zip(x.as_slice().par_chunks(CHUNK).zip(x_prev.as_slice().par_chunks(CHUNK)))
            .enumerate()
            .for_each(|(c, (ws, (xs, ps)))| {
                let off = c * CHUNK;
                for (k, (wv, (&xv, &pv))) in ws.iter_mut().zip(xs.iter().zip(ps)).enumerate() {
                    let zv = xv + beta * (xv - pv);
                    *wv = if mask.active[off + k] { zv + step * self.table.eval(lv[off + k], zv).1 } else { zv };
                }
            });
    }

    fn project(&self, x: &mut DMatrix<f64>) -> usize {
        project_box_and_sums(x, self.constraints, self.alpha)
    }

    /// The rank of `grid` (ranks above min(m, n) skipped) whose fit on a
    /// training mask scores the held-out readings best; returns it with its fit.
    fn choose_rank(
        &self,
        grid: &[usize],
        observed: &[bool],
        init: &DMatrix<f64>,
        rng: &mut impl Rng,
        progress: ProgressFn<'_>,
        diagnostics: &mut Diagnostics,
    ) -> (usize, DMatrix<f64>) {
        let (p, levels) = (self.p, self.levels);
        let max_rank = levels.rows().min(levels.cols());
        let mut grid: Vec<usize> = grid.iter().copied().filter(|r| *r <= max_rank).collect();
        if grid.is_empty() {
            grid.push(max_rank);
        }
        let held: Vec<bool> = observed.iter().map(|&o| o && rng.random_bool(p.holdout_fraction.max(1e-9))).collect();
        let train = Mask { active: observed.iter().zip(&held).map(|(&o, &h)| o && !h).collect() };
        let floor = self.corrupt_log_threshold();
        let mut best: Option<(f64, usize, DMatrix<f64>)> = None;
        for (gi, &r) in grid.iter().enumerate() {
            progress("choosing rank", gi as f64 / grid.len() as f64);
            let f = self.fit(&train, r, init, p.search_iterations, rng);
            diagnostics.search_iterations += f.iterations;
            let (mut s, mut c) = (0.0, 0usize);
            for (idx, &h) in held.iter().enumerate() {
                if h {
                    // Clipped at the corruption threshold so a few bad readings do not decide.
                    s += self.table.eval(levels.as_slice()[idx], f.x.as_slice()[idx]).0.max(floor);
                    c += 1;
                }
            }
            let score = if c > 0 { s / c as f64 } else { -f.objective };
            diagnostics.rank_scores.push((r, score));
            if best.as_ref().is_none_or(|b| score > b.0) {
                best = Some((score, r, f.x));
            }
        }
        let (_, r, x) = best.unwrap_or_else(|| (0.0, grid[0], init.clone()));
        (r, x)
    }

    fn fit(&self, base: &Mask, rank: usize, init: &DMatrix<f64>, max_iterations: usize, rng: &mut impl Rng) -> Fit {
        let (m, n) = init.shape();
        let p = self.p;
        // The first truncation starts cold with extra subspace rounds; later ones are
        // warm-started from the previous right subspace.
        let mut lr = truncate(init, rank, p.oversample, p.power_iterations + 1, None, rng);
        let mut x = DMatrix::zeros(m, n);
        lr.reconstruct_into(&mut x);
        self.project(&mut x);
        let mut corrupt = vec![false; base.active.len()];
        let mut mask = base.clone();
        let mut obj = self.objective(&x, &mask);
        let mut x_prev = x.clone();
        let mut w = DMatrix::zeros(m, n);
        let mut x_new = DMatrix::zeros(m, n);
        let mut t = 1.0f64;
        let mut calm = 0;
        let mut stop = Stop::MaxIterations;
        let mut it = 0;
        let mut restarts = RestartCounter::new(p.tolerance);
        while it < max_iterations {
            it += 1;
            let t_next = 0.5 * (1.0 + (1.0 + 4.0 * t * t).sqrt());
            let beta = (t - 1.0) / t_next;
            self.ascent(&x, &x_prev, beta, &mask, &mut w);
            let lr_new = truncate(&w, rank, p.oversample, p.power_iterations, Some(&lr.v), rng);
            lr_new.reconstruct_into(&mut x_new);
            self.project(&mut x_new);
            let obj_new = self.objective(&x_new, &mask);
            if obj_new > obj && beta > 0.0 {
                // Momentum overshot: restart from x with a plain gradient step.
                t = 1.0;
                x_prev.copy_from(&x);
                if restarts.restart(obj) {
                    stop = Stop::Stalled;
                    break;
                }
                continue;
            }
            t = t_next;
            x_prev.copy_from(&x);
            x.copy_from(&x_new);
            lr = lr_new;
            let rel = (obj - obj_new).abs() / obj.abs().max(1e-12);
            obj = obj_new;
            // Re-judge corrupt readings every 10 iterations after a warm-up.
            if p.max_corrupt_fraction > 0.0 && it >= 10 && it % 10 == 0 {
                let c = self.implausible_entries(&x, base);
                if c != corrupt {
                    corrupt = c;
                    for (a, (&b, &cc)) in mask.active.iter_mut().zip(base.active.iter().zip(&corrupt)) {
                        *a = b && !cc;
                    }
                    obj = self.objective(&x, &mask);
                    calm = 0;
                    continue;
                }
            }
            if rel < p.tolerance {
                calm += 1;
                if calm >= 5 {
                    stop = Stop::Converged;
                    break;
                }
            } else {
                calm = 0;
            }
        }
        Fit { x, lr, iterations: it, stop, restarts: restarts.restarts, objective: obj, excluded: corrupt }
    }
}

/// One plain iteration (Nesterov extrapolation with momentum index `t`, gradient
/// ascent step of s²/curvature, rank-`rank` truncation with `oversample` extra
/// columns and `power` subspace rounds, clipping to [0, alpha]),
/// with no restarts or corruption handling: the unit the Python reference
/// (tests/reference/recovery_iteration.py) implements too. Returns (x_new, t_next).
#[allow(clippy::too_many_arguments)]
pub fn one_iteration(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    x: &DMatrix<f64>,
    x_prev: &DMatrix<f64>,
    t: f64,
    rank: usize,
    alpha: f64,
    oversample: usize,
    power: usize,
    rng: &mut impl Rng,
) -> (DMatrix<f64>, f64) {
    let table =
        LikelihoodTable::new(profile, -0.5 * alpha - 5.0 * profile.scale_kw(), 1.5 * alpha + 5.0 * profile.scale_kw());
    let p = super::RecoveryParams::default();
    let ctx = Ctx { levels, table: &table, constraints: &[], alpha, step: 1.0 / max_curvature(profile), p: &p };
    let mask = Mask { active: levels.as_slice().iter().map(|&v| v != MISSING).collect() };
    let t_next = 0.5 * (1.0 + (1.0 + 4.0 * t * t).sqrt());
    let beta = (t - 1.0) / t_next;
    let mut w = DMatrix::zeros(x.nrows(), x.ncols());
    ctx.ascent(x, x_prev, beta, &mask, &mut w);
    let lr = truncate(&w, rank, oversample, power, None, rng);
    let mut out = DMatrix::zeros(x.nrows(), x.ncols());
    lr.reconstruct_into(&mut out);
    ctx.project(&mut out);
    (out, t_next)
}

/// Exact Euclidean projection of each constrained run onto
/// {0 ≤ x ≤ alpha, Σ x = target}, and plain clipping elsewhere. Returns how many
/// constraints were infeasible (target outside [0, alpha · len]).
pub fn project_box_and_sums(x: &mut DMatrix<f64>, constraints: &[SumConstraint], alpha: f64) -> usize {
    for v in x.as_mut_slice() {
        *v = v.clamp(0.0, alpha);
    }
    let mut infeasible = 0;
    let mut buf = Vec::new();
    for c in constraints {
        buf.clear();
        buf.extend(c.cols.clone().map(|j| x[(c.row, j)]));
        if !shift_to_sum(&mut buf, c.sum_kw, alpha) {
            infeasible += 1;
        }
        for (k, j) in c.cols.clone().enumerate() {
            x[(c.row, j)] = buf[k];
        }
    }
    infeasible
}

/// Replaces v by clip(v + τ, 0, alpha) with τ such that the sum equals `target`
/// (the projection onto box ∩ hyperplane). False if the target is unreachable.
fn shift_to_sum(v: &mut [f64], target: f64, alpha: f64) -> bool {
    if v.is_empty() {
        return target.abs() < 1e-9;
    }
    let n = v.len() as f64;
    let feasible = (0.0..=alpha * n).contains(&target);
    let target = target.clamp(0.0, alpha * n);
    let sum_at = |tau: f64, v: &[f64]| v.iter().map(|x| (x + tau).clamp(0.0, alpha)).sum::<f64>();
    let (mut lo, mut hi) = (-alpha, alpha);
    // Bisection to machine precision on a monotone function of τ.
    for _ in 0..100 {
        let mid = 0.5 * (lo + hi);
        if sum_at(mid, v) < target {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-15 * alpha {
            break;
        }
    }
    let tau = 0.5 * (lo + hi);
    for x in v.iter_mut() {
        *x = (*x + tau).clamp(0.0, alpha);
    }
    // Spread the last rounding residue over the entries not at a bound.
    let resid = target - v.iter().sum::<f64>();
    let free: Vec<usize> = (0..v.len()).filter(|&i| v[i] > 0.0 && v[i] < alpha).collect();
    if !free.is_empty() {
        let d = resid / free.len() as f64;
        for i in free {
            v[i] = (v[i] + d).clamp(0.0, alpha);
        }
    }
    feasible
}

/// Levels within the profile's range, and constraints inside the window with finite sums.
fn check_inputs(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
) -> Result<(), FieldError> {
    let (m, n, k) = (levels.rows(), levels.cols(), profile.levels());
    if let Some(bad) = levels.as_slice().iter().find(|&&v| v != MISSING && usize::from(v) >= k) {
        return Err(FieldError::new("level", format!("{bad} is out of range for a profile with {k} levels")));
    }
    for (ci, c) in constraints.iter().enumerate() {
        if c.row >= m || c.cols.end > n || c.cols.start >= c.cols.end || !c.sum_kw.is_finite() {
            return Err(FieldError::new(
                format!("constraints[{ci}]"),
                "refers to intervals outside the window or has no finite sum",
            ));
        }
    }
    Ok(())
}

/// Recovers every meter's profile. `levels` is meters × intervals; `constraints`
/// fix sums of runs of a meter's intervals (from register reads); `cols_per_day`
/// and `day_phase` (intervals from the window start to the first UTC midnight)
/// let outages be filled from the meters' own days.
pub fn recover(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    layout: outage::DayLayout,
    params: &ValidRecoveryParams,
    progress: ProgressFn<'_>,
) -> Result<Recovery, FieldError> {
    recover_from(levels, profile, constraints, layout, params, None, progress)
}

/// [`recover`], started from `warm` when given: its estimates (the same
/// meters × intervals as `levels`) and its rank replace the cold start and the
/// rank search.
pub fn recover_from(
    levels: &LevelMatrix,
    profile: &DitherProfile,
    constraints: &[SumConstraint],
    layout: outage::DayLayout,
    params: &ValidRecoveryParams,
    warm: Option<&super::WarmStart>,
    progress: ProgressFn<'_>,
) -> Result<Recovery, FieldError> {
    let t0 = Instant::now();
    let p = params.get();
    let (m, n) = (levels.rows(), levels.cols());
    check_inputs(levels, profile, constraints)?;
    check_warm(warm, m, n)?;
    let alpha = p.alpha_kw;
    let table = LikelihoodTable::for_fit(profile, alpha)?;
    let observed: Vec<bool> = levels.as_slice().iter().map(|&v| v != MISSING).collect();
    let n_obs = observed.iter().filter(|b| **b).count();
    let mut diagnostics = Diagnostics::before_fit(n_obs, warm.is_some());
    if m == 0 || n == 0 || n_obs == 0 {
        let mut x = DMatrix::zeros(m, n);
        diagnostics.infeasible_constraints = project_box_and_sums(&mut x, constraints, alpha);
        diagnostics.wall_s = t0.elapsed().as_secs_f64();
        return Ok(Recovery {
            std_kw: DMatrix::from_element(m, n, f64::INFINITY),
            flags: vec![Flag::Estimated; m * n],
            x,
            diagnostics,
        });
    }

    let ctx = Ctx { levels, table: &table, constraints, alpha, step: 1.0 / max_curvature(profile), p };
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(p.seed);
    let init = initial_estimate(levels, &table, alpha);
    let full = Mask { active: observed.clone() };
    let (rank, start) = ctx.start(warm, init, &observed, &mut rng, progress, &mut diagnostics);
    progress("fitting", 0.0);
    let fit = ctx.fit(&full, rank, &start, p.max_iterations, &mut rng);
    drop(start);
    progress("fitting", 1.0);

    let corrupt = ctx.judge_corrupt(&fit.x, &full, &fit.excluded);
    let mut x = fit.x;
    let flags = super::corrupt::flags(&observed, &fit.excluded, &corrupt);
    let outage_cols = outage::fill_outages(&mut x, levels, layout);
    diagnostics.outage_intervals = outage_cols;
    diagnostics.infeasible_constraints = ctx.project(&mut x);
    let used = Mask { active: observed.iter().zip(&fit.excluded).map(|(&o, &c)| o && !c).collect() };
    let std_kw = uncertainty(&fit.lr, &used, &table, &x);
    diagnostics.iterations = fit.iterations;
    diagnostics.stop = fit.stop;
    diagnostics.restarts = fit.restarts;
    diagnostics.log_likelihood_per_reading = -ctx.objective(&x, &used);
    diagnostics.rank = fit.lr.rank();
    diagnostics.corrected = corrupt.iter().filter(|c| **c).count();
    diagnostics.atypical = fit.excluded.iter().filter(|c| **c).count() - diagnostics.corrected;
    diagnostics.wall_s = t0.elapsed().as_secs_f64();
    Ok(Recovery { x, flags, std_kw, diagnostics })
}

/// A warm start must hold the window's meters × intervals at a rank of at least 1.
fn check_warm(warm: Option<&super::WarmStart>, m: usize, n: usize) -> Result<(), FieldError> {
    match warm {
        Some(w) if w.x.shape() != (m, n) || w.rank == 0 => Err(FieldError::new(
            "warm_start",
            format!(
                "holds {}×{} estimates at rank {}, the window is {m}×{n} and needs a rank of at least 1",
                w.x.nrows(),
                w.x.ncols(),
                w.rank
            ),
        )),
        _ => Ok(()),
    }
}

impl Diagnostics {
    fn before_fit(readings: usize, warm_start: bool) -> Self {
        Self {
            iterations: 0,
            search_iterations: 0,
            warm_start,
            stop: Stop::Empty,
            restarts: 0,
            log_likelihood_per_reading: 0.0,
            rank: 0,
            rank_scores: Vec::new(),
            readings,
            corrected: 0,
            atypical: 0,
            outage_intervals: 0,
            infeasible_constraints: 0,
            wall_s: 0.0,
        }
    }
}

impl Ctx<'_> {
    /// The final fit's rank and starting matrix: the warm start's (entries not
    /// finite take the cold start's value), the fixed rank from the cold start,
    /// or the rank search's winner with its fit. Only one starting matrix is
    /// kept alive into the final fit.
    fn start(
        &self,
        warm: Option<&super::WarmStart>,
        init: DMatrix<f64>,
        observed: &[bool],
        rng: &mut impl Rng,
        progress: ProgressFn<'_>,
        diagnostics: &mut Diagnostics,
    ) -> (usize, DMatrix<f64>) {
        let max_rank = self.levels.rows().min(self.levels.cols());
        let alpha = self.alpha;
        match (warm, &self.p.rank) {
            (Some(w), _) => {
                let x = w.x.zip_map(&init, |v, c| if v.is_finite() { v.clamp(0.0, alpha) } else { c });
                (w.rank.min(max_rank), x)
            }
            (None, RankChoice::Fixed(r)) => ((*r).min(max_rank), init),
            (None, RankChoice::Auto(grid)) => self.choose_rank(grid, observed, &init, rng, progress, diagnostics),
        }
    }
}

/// First-order standard deviation of each estimate under the rank-r model.
///
/// With X = L Rᵀ (L = U√S, R = V√S) and Fisher information I_ij of each used
/// reading at its estimate, the row factor L_i has information
/// A_i = Σ_j I_ij R_j R_jᵀ and the column factor R_j has B_j = Σ_i I_ij L_i L_iᵀ.
/// We approximate A_i ≈ c_i RᵀR with c_i the row's mean information (and B_j
/// likewise), which keeps the cost at O(m n + (m + n) r²) instead of O(m n r²),
/// and take Var X_ij ≈ R_jᵀ A_i⁻¹ R_j + L_iᵀ B_j⁻¹ L_i (the factor covariance is
/// ignored). This ignores rank selection and bias, so it is a floor on the error,
/// not a guarantee. Entries with no information anywhere in their row or column
/// get an infinite deviation (band [0, alpha]).
fn uncertainty(lr: &LowRank, used: &Mask, table: &LikelihoodTable, x: &DMatrix<f64>) -> DMatrix<f64> {
    let (m, n) = x.shape();
    let r = lr.rank();
    if r == 0 {
        return DMatrix::from_element(m, n, f64::INFINITY);
    }
    let k = table.profile().levels();
    let mut row_info = vec![0.0; m];
    let mut col_info = vec![0.0; n];
    for j in 0..n {
        for i in 0..m {
            if used.active[i + j * m] {
                let xv = x[(i, j)];
                let info: f64 = (0..k as u8)
                    .map(|lv| {
                        let (l, d) = table.eval(lv, xv);
                        l.exp() * d * d
                    })
                    .sum();
                row_info[i] += info;
                col_info[j] += info;
            }
        }
    }
    // Leverages of the factors: h_i = L_iᵀ (LᵀL)⁻¹ L_i = |U_i|², g_j = |V_j|² (U, V orthonormal).
    let h: Vec<f64> = (0..m).map(|i| lr.u.row(i).norm_squared()).collect();
    let g: Vec<f64> = (0..n).map(|j| lr.v.row(j).norm_squared()).collect();
    DMatrix::from_fn(m, n, |i, j| {
        let (c, d) = (row_info[i] / n as f64, col_info[j] / m as f64);
        if c <= 0.0 || d <= 0.0 {
            return f64::INFINITY;
        }
        // R_jᵀ (c RᵀR)⁻¹ R_j = g_j / c, since RᵀR = S and R_j = V_j √S.
        (g[j] / c + h[i] / d).sqrt()
    })
}
