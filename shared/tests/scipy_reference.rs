//! The mechanism's log-likelihood against an outside reference: scipy's
//! `special.log_ndtr` and `stats.logistic.logcdf` for one-sided tails, and mpmath
//! at 60 digits for interval probabilities and derivatives. The script is
//! `tests/reference/likelihood_reference.py`; versions are pinned in
//! `tests/reference/requirements.txt` (scipy 1.17.1, mpmath 1.3.0) and the versions
//! actually used are printed by the test.

mod common;

use meterveil_shared::mechanism::log_likelihood;
use meterveil_shared::special::{log_logistic_cdf, log_ndtr};
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use serde_json::Value;

fn reference() -> Value {
    common::python_json("likelihood_reference.py", &[])
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * b.abs().max(1.0)
}

#[test]
fn log_likelihood_matches_scipy_and_mpmath() {
    let r = reference();
    eprintln!("reference: scipy {}, mpmath {}", r["scipy"], r["mpmath"]);

    for c in r["one_sided"].as_array().expect("one_sided") {
        let z = c["z"].as_f64().expect("z");
        let want = c["log_ndtr"].as_f64().expect("log_ndtr");
        assert!(close(log_ndtr(z), want, 1e-12), "log_ndtr({z}) = {} vs scipy {want}", log_ndtr(z));
        let want = c["log_logistic_cdf"].as_f64().expect("logistic");
        assert!(close(log_logistic_cdf(z), want, 1e-12), "logistic logcdf({z})");
    }

    let cases = r["cases"].as_array().expect("cases");
    assert!(cases.len() > 200, "reference grid is too small: {}", cases.len());
    let mut worst_z = 0.0f64;
    for c in cases {
        let spec: DitherProfileSpec = serde_json::from_value(serde_json::json!({
            "noise": c["noise"], "scale_kw": c["scale_kw"], "boundaries_kw": c["boundaries_kw"],
        }))
        .expect("spec");
        let p = DitherProfile::try_from(spec).expect("valid profile");
        let level = c["level"].as_u64().expect("level") as u8;
        let x = c["x_kw"].as_f64().expect("x");
        let (lp, dlp) = log_likelihood(&p, level, x);
        let (want_lp, want_dlp) = (c["log_p"].as_f64().expect("lp"), c["dlog_p"].as_f64().expect("dlp"));
        assert!(lp.is_finite() && dlp.is_finite(), "{c}: non-finite {lp} {dlp}");
        assert!(close(lp, want_lp, 1e-9), "{c}: log_p {lp} vs {want_lp}");
        assert!(close(dlp, want_dlp, 1e-7), "{c}: dlog_p {dlp} vs {want_dlp}");
        for b in p.boundaries_kw() {
            worst_z = worst_z.max(((b - x) / p.scale_kw()).abs());
        }
    }
    // The grid must reach the tails the contract promises (|z| >= 40).
    assert!(worst_z >= 40.0, "grid only reaches |z| = {worst_z}");
}
