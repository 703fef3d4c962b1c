//! One iteration of the Rust recovery against the project-owned numpy/scipy
//! reference (tests/reference/recovery_iteration.py) on a small fixed problem.
//! With the randomized range as wide as the matrix, the truncation is exact, so
//! the two must agree to rounding.

mod common;

use std::io::Write;
use std::process::{Command, Stdio};

use common::gaussian_profile;
use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::solver::one_iteration;
use meterveil_shared::recovery::LevelMatrix;
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use serde_json::json;

#[test]
fn one_iteration_matches_the_numpy_reference() {
    let (m, n, r, alpha) = (24usize, 40usize, 3usize, 6.0);
    let p = gaussian_profile(0.3, &[1.0, 2.0]);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(12);
    let truth = DMatrix::<f64>::from_fn(m, n, |i, j| 1.2 + ((i * 7 + j * 3) % 11) as f64 * 0.15);
    let mut levels = LevelMatrix::missing(m, n);
    let mut grid = vec![vec![-1i64; n]; m];
    for i in 0..m {
        for j in 0..n {
            if rng.random_bool(0.9) {
                let l = dither_and_quantize(&p, truth[(i, j)], &mut rng);
                levels.set(i, j, Some(l));
                grid[i][j] = i64::from(l);
            }
        }
    }
    let x = DMatrix::<f64>::from_fn(m, n, |_, _| rng.random_range(0.2..3.0));
    let x_prev = DMatrix::<f64>::from_fn(m, n, |_, _| rng.random_range(0.2..3.0));
    let rows = |a: &DMatrix<f64>| (0..m).map(|i| (0..n).map(|j| a[(i, j)]).collect::<Vec<_>>()).collect::<Vec<_>>();
    let t = 2.5;
    let problem = json!({
        "levels": grid, "x": rows(&x), "x_prev": rows(&x_prev), "t": t, "rank": r, "alpha": alpha,
        "scale_kw": 0.3, "boundaries_kw": [1.0, 2.0],
    });
    let python = std::env::var("METERVEIL_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/recovery_iteration.py");
    let mut child =
        Command::new(&python).arg(script).stdin(Stdio::piped()).stdout(Stdio::piped()).spawn().expect("python");
    child.stdin.take().expect("stdin").write_all(problem.to_string().as_bytes()).expect("write");
    let out = child.wait_with_output().expect("reference");
    assert!(out.status.success());
    let reference: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    eprintln!("reference: numpy {}", reference["numpy"]);

    let (got, t_next) = one_iteration(&levels, &p, &x, &x_prev, t, r, alpha, m.min(n), 1, &mut rng);
    assert!((t_next - reference["t_next"].as_f64().expect("t")).abs() < 1e-12);
    let want = DMatrix::<f64>::from_fn(m, n, |i, j| reference["x_new"][i][j].as_f64().expect("x"));
    let err = (&got - &want).norm() / want.norm();
    assert!(err < 1e-9, "relative difference {err}");
    // The step did something: it is not the input.
    assert!((&got - &x).norm() / x.norm() > 1e-3);
}
