//! Rank-r truncation by randomized subspace iteration, warm-started from the
//! previous iterate's right subspace (Halko, Martinsson and Tropp 2011, alg. 4.4).

use nalgebra::{DMatrix, SymmetricEigen};
use rand::Rng;
use rand_distr::StandardNormal;

/// A rank-r factorisation U · diag(s) · Vᵀ with orthonormal U (m, r) and V (n, r).
#[derive(Debug, Clone)]
pub struct LowRank {
    pub u: DMatrix<f64>,
    pub s: Vec<f64>,
    pub v: DMatrix<f64>,
}

impl LowRank {
    pub fn rank(&self) -> usize {
        self.s.len()
    }

    /// Writes U · diag(s) · Vᵀ into `out` (m, n).
    pub fn reconstruct_into(&self, out: &mut DMatrix<f64>) {
        let mut us = self.u.clone();
        for (j, sj) in self.s.iter().enumerate() {
            us.column_mut(j).scale_mut(*sj);
        }
        out.gemm(1.0, &us, &self.v.transpose(), 0.0);
    }
}

/// Orthonormal basis (m, k) of the columns of `y` (m, k), by Householder QR.
/// Dependent columns get arbitrary orthonormal completions; the small SVD later
/// gives them zero weight.
fn orthonormal(y: DMatrix<f64>) -> DMatrix<f64> {
    y.qr().q()
}

/// Best rank-`r` approximation of `a` (m, n), approximately, by `power` rounds of
/// subspace iteration on a start basis of `r + oversample` columns: the previous
/// right singular vectors `warm` (n, ≤ r) first, random gaussian columns after.
pub fn truncate(
    a: &DMatrix<f64>,
    r: usize,
    oversample: usize,
    power: usize,
    warm: Option<&DMatrix<f64>>,
    rng: &mut impl Rng,
) -> LowRank {
    let (m, n) = a.shape();
    let r = r.min(m).min(n);
    if r == 0 {
        return LowRank { u: DMatrix::zeros(m, 0), s: Vec::new(), v: DMatrix::zeros(n, 0) };
    }
    let k = (r + oversample).min(m).min(n);
    // Ω (n, k)
    let mut omega = DMatrix::<f64>::from_fn(n, k, |_, _| rng.sample(StandardNormal));
    if let Some(w) = warm {
        let c = w.ncols().min(k);
        omega.columns_mut(0, c).copy_from(&w.columns(0, c));
    }
    // Aᵀ·Q is formed as (Qᵀ·A)ᵀ: nalgebra's transpose of the big A is slow.
    let mut q = orthonormal(a * &omega); // (m, k)
    for _ in 0..power {
        let z = orthonormal((q.transpose() * a).transpose()); // (n, k)
        q = orthonormal(a * z);
    }
    let kk = q.ncols();
    let b = q.transpose() * a; // (kk, n)
                               // SVD of the small B through the eigen-decomposition of B Bᵀ (kk, kk).
    let bbt = &b * b.transpose();
    let eig = SymmetricEigen::new(bbt);
    let mut order: Vec<usize> = (0..kk).collect();
    order.sort_by(|&i, &j| eig.eigenvalues[j].total_cmp(&eig.eigenvalues[i]));
    let keep = r.min(kk);
    let mut ub = DMatrix::zeros(kk, keep);
    let mut s = Vec::with_capacity(keep);
    for (c, &i) in order.iter().take(keep).enumerate() {
        ub.column_mut(c).copy_from(&eig.eigenvectors.column(i));
        s.push(eig.eigenvalues[i].max(0.0).sqrt());
    }
    let mut u = &q * &ub; // (m, keep)
                          // V = Bᵀ U_b diag(1/s); components with s ≈ 0 are dropped below.
    let mut v = b.transpose() * &ub; // (n, keep)
    for (c, sc) in s.iter().enumerate() {
        if *sc > 1e-12 {
            v.column_mut(c).scale_mut(1.0 / sc);
        }
    }
    // Drop numerically null components (rank-deficient input).
    let smax = s.first().copied().unwrap_or(0.0);
    let nz = s.iter().take_while(|x| **x > 1e-12 * smax.max(1e-300)).count();
    if nz < s.len() {
        s.truncate(nz);
        u = u.columns(0, nz).clone_owned();
        v = v.columns(0, nz).clone_owned();
    }
    LowRank { u, s, v }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    fn planted(m: usize, n: usize, r: usize, rng: &mut impl Rng) -> DMatrix<f64> {
        let a = DMatrix::<f64>::from_fn(m, r, |_, _| rng.sample(StandardNormal));
        let b = DMatrix::<f64>::from_fn(r, n, |_, _| rng.sample(StandardNormal));
        a * b
    }

    #[test]
    fn recovers_planted_low_rank_over_shapes() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        for &(m, n, r) in &[(1, 1, 1), (60, 8, 3), (8, 60, 3), (100, 80, 5), (30, 30, 30)] {
            let a = planted(m, n, r, &mut rng);
            let lr = truncate(&a, r, 5, 1, None, &mut rng);
            let mut x = DMatrix::zeros(m, n);
            lr.reconstruct_into(&mut x);
            let err = (&x - &a).norm() / a.norm();
            assert!(err < 1e-8, "{m}x{n} r{r}: {err}");
            // U and V orthonormal.
            let utu = lr.u.transpose() * &lr.u;
            assert!((utu - DMatrix::identity(lr.rank(), lr.rank())).norm() < 1e-8);
        }
    }

    #[test]
    fn rank_deficient_and_zero_inputs() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
        let a = planted(40, 30, 2, &mut rng);
        let lr = truncate(&a, 10, 5, 1, None, &mut rng);
        assert_eq!(lr.rank(), 2, "null components are dropped");
        let z = DMatrix::<f64>::zeros(5, 7);
        let lr = truncate(&z, 3, 2, 1, None, &mut rng);
        assert_eq!(lr.rank(), 0);
    }

    #[test]
    fn singular_values_match_nalgebra_svd() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let a = planted(50, 40, 4, &mut rng)
            + DMatrix::<f64>::from_fn(50, 40, |_, _| 1e-3 * rng.sample::<f64, _>(StandardNormal));
        let lr = truncate(&a, 4, 8, 2, None, &mut rng);
        let svd = a.clone().svd(false, false);
        let mut sv: Vec<f64> = svd.singular_values.iter().copied().collect();
        sv.sort_by(|x, y| y.total_cmp(x));
        for i in 0..4 {
            assert!((lr.s[i] - sv[i]).abs() < 1e-6 * sv[0], "{i}: {} vs {}", lr.s[i], sv[i]);
        }
    }
}
