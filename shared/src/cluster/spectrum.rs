//! The leading eigenpairs of the normalised affinity, and how their solver stopped.

use nalgebra::{DMatrix, SymmetricEigen};
use rand::{Rng, SeedableRng};
use serde::Serialize;

/// Most steps of the subspace iteration.
const MAX_SUBSPACE_STEPS: usize = 1000;

/// How the eigensolver stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum EigenStop {
    /// A dense eigendecomposition (small populations): exact, no iteration.
    Direct,
    /// The subspace iteration settled (the sum of its Ritz values stopped rising).
    Settled,
    /// The subspace iteration ran its step limit without settling.
    MaxIterations,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct EigenSolve {
    pub stop: EigenStop,
    /// Steps of the subspace iteration (0 for the dense path).
    pub iterations: usize,
}

/// Leading `k` eigenpairs of the normalised affinity D^-1/2 W D^-1/2, by dense
/// eigendecomposition for small populations and block subspace iteration on the
/// sparse operator beyond.
pub(super) fn leading_eigen(
    w: &[Vec<(usize, f64)>],
    k: usize,
    seed: u64,
    dense_limit: usize,
) -> (Vec<f64>, DMatrix<f64>, EigenSolve) {
    let m = w.len();
    let deg: Vec<f64> = w.iter().map(|r| r.iter().map(|e| e.1).sum::<f64>()).collect();
    let inv_sqrt: Vec<f64> = deg.iter().map(|d| if *d > 0.0 { 1.0 / d.sqrt() } else { 0.0 }).collect();
    let k = k.min(m);
    if m <= dense_limit {
        let mut a = DMatrix::<f64>::zeros(m, m);
        for (i, row) in w.iter().enumerate() {
            for &(j, v) in row {
                a[(i, j)] = v * inv_sqrt[i] * inv_sqrt[j];
            }
        }
        let eig = SymmetricEigen::new(a);
        let mut order: Vec<usize> = (0..m).collect();
        order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
        let vals = order.iter().take(k).map(|&i| eig.eigenvalues[i]).collect();
        let vecs = DMatrix::from_fn(m, k, |r, c| eig.eigenvectors[(r, order[c])]);
        return (vals, vecs, EigenSolve { stop: EigenStop::Direct, iterations: 0 });
    }
    // Subspace iteration on (A + I)/2, whose spectrum is in [0, 1] with the same vectors.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut q = DMatrix::<f64>::from_fn(m, k, |_, _| rng.random_range(-1.0..1.0)).qr().q();
    let apply = |q: &DMatrix<f64>| -> DMatrix<f64> {
        let mut out = q * 0.5;
        for (i, row) in w.iter().enumerate() {
            for &(j, v) in row {
                let a = 0.5 * v * inv_sqrt[i] * inv_sqrt[j];
                for c in 0..q.ncols() {
                    out[(i, c)] += a * q[(j, c)];
                }
            }
        }
        out
    };
    // Stop when the trace of QᵀAQ (the sum of the Ritz values, which rises to its
    // maximum as Q reaches the leading subspace) settles; at most 1000 steps.
    let mut last = f64::NEG_INFINITY;
    let mut solve = EigenSolve { stop: EigenStop::MaxIterations, iterations: MAX_SUBSPACE_STEPS };
    for it in 1..=MAX_SUBSPACE_STEPS {
        let aq = apply(&q);
        if it % 10 == 0 {
            let trace: f64 = (0..k).map(|c| q.column(c).dot(&aq.column(c))).sum();
            let settled = (trace - last).abs() < 1e-11 * k as f64;
            last = trace;
            if settled {
                solve = EigenSolve { stop: EigenStop::Settled, iterations: it };
                break;
            }
        }
        q = aq.qr().q();
    }
    let aq = apply(&q);
    let small = q.transpose() * &aq;
    let eig = SymmetricEigen::new(small);
    let mut order: Vec<usize> = (0..k).collect();
    order.sort_by(|&a, &b| eig.eigenvalues[b].total_cmp(&eig.eigenvalues[a]));
    let vals = order.iter().map(|&i| 2.0 * eig.eigenvalues[i] - 1.0).collect();
    let rot = DMatrix::from_fn(k, k, |r, c| eig.eigenvectors[(r, order[c])]);
    (vals, q * rot, solve)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Four cliques of 30 joined in a ring by single weak edges: four leading
    /// eigenvalues near 1, then a wide gap, so the subspace iteration settles
    /// early, and agrees with the dense solver.
    #[test]
    fn the_subspace_iteration_settles_on_a_clear_gap_and_says_when() {
        let (blocks, size) = (4, 30);
        let m = blocks * size;
        let mut w: Vec<Vec<(usize, f64)>> = vec![Vec::new(); m];
        for (i, row) in w.iter_mut().enumerate() {
            row.extend((0..m).filter(|&j| i != j && i / size == j / size).map(|j| (j, 1.0)));
        }
        for b in 0..blocks {
            let (i, j) = (b * size, ((b + 1) % blocks) * size + 1);
            w[i].push((j, 0.1));
            w[j].push((i, 0.1));
        }
        let (dense_vals, _, dense) = leading_eigen(&w, blocks, 1, m);
        let (vals, _, solve) = leading_eigen(&w, blocks, 1, 10);
        assert_eq!(dense, EigenSolve { stop: EigenStop::Direct, iterations: 0 });
        assert_eq!(solve.stop, EigenStop::Settled, "{solve:?}");
        assert!(solve.iterations >= 10 && solve.iterations <= 100, "{solve:?}");
        for (a, b) in vals.iter().zip(&dense_vals) {
            assert!((a - b).abs() < 1e-6, "{vals:?} against {dense_vals:?}");
        }
    }
}
