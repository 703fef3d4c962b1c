"""Project-owned reference of one recovery iteration, in numpy/scipy.

Reads a JSON problem on stdin (levels with -1 for missing, gaussian profile,
current and previous iterate, momentum index t, rank, alpha) and prints the
next iterate. The same step as shared::recovery::solver::one_iteration:
Nesterov extrapolation, gradient ascent on the quantized log-likelihood with
step s^2, exact rank-r truncation by numpy's SVD, clipping to [0, alpha].

Also importable: `iteration(...)` is used by bench/iteration_speed.py.
"""
import json
import sys

import numpy as np
from scipy import special

LN_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)


def log_interval(za, zb):
    """log(Phi(zb) - Phi(za)) elementwise, za < zb, infinities allowed."""
    upper = (za + zb) > 0
    # Mostly in the upper tail: use survival functions, Phi(-z).
    hi = np.where(upper, special.log_ndtr(-za), special.log_ndtr(zb))
    lo = np.where(upper, special.log_ndtr(-zb), special.log_ndtr(za))
    d = lo - hi
    with np.errstate(divide="ignore", invalid="ignore"):
        tail = np.where(d > -np.log(2.0), np.log(-np.expm1(d)), np.log1p(-np.exp(d)))
    return hi + tail


def gradient(levels, x, scale, bounds):
    """d/dx log P(level | x) per entry; 0 where the level is missing (-1)."""
    b = np.concatenate(([-np.inf], np.asarray(bounds, float), [np.inf]))
    obs = levels >= 0
    k = np.where(obs, levels, 0)
    za = (b[k] - x) / scale
    zb = (b[k + 1] - x) / scale
    logp = log_interval(za, zb)
    with np.errstate(over="ignore", invalid="ignore"):
        fa = np.where(np.isfinite(za), np.exp(-0.5 * za * za - LN_SQRT_2PI - logp), 0.0)
        fb = np.where(np.isfinite(zb), np.exp(-0.5 * zb * zb - LN_SQRT_2PI - logp), 0.0)
    return np.where(obs, (fa - fb) / scale, 0.0)


def iteration(levels, x, x_prev, t, rank, alpha, scale, bounds, svd=None):
    t_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
    beta = (t - 1.0) / t_next
    z = x + beta * (x - x_prev)
    w = z + scale * scale * gradient(levels, z, scale, bounds)
    if svd is None:
        u, s, vt = np.linalg.svd(w, full_matrices=False)
    else:
        u, s, vt = svd(w, rank)
    out = (u[:, :rank] * s[:rank]) @ vt[:rank]
    return np.clip(out, 0.0, alpha), t_next


def main():
    p = json.load(sys.stdin)
    levels = np.asarray(p["levels"], dtype=np.int64)
    x = np.asarray(p["x"], float)
    x_prev = np.asarray(p["x_prev"], float)
    out, t_next = iteration(levels, x, x_prev, p["t"], p["rank"], p["alpha"], p["scale_kw"], p["boundaries_kw"])
    json.dump({"numpy": np.__version__, "x_new": out.tolist(), "t_next": t_next}, sys.stdout)


if __name__ == "__main__":
    main()
