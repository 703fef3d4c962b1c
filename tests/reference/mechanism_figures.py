"""Mutual information and local differential-privacy epsilon of the dither
mechanism, computed independently of the Rust code, printed as JSON.

Mutual information I(X; L) = sum_l int p(x) P(l|x) log2(P(l|x) / P(l)) dx with
P(l) = int p(x) P(l|x) dx, each integral by scipy.integrate.quad. P(l|x) comes
from scipy.stats (norm, logistic) cdfs of the band edges. Epsilon is
max_l [max_x log P(l|x) - min_x log P(l|x)] over [lo, hi]: the maximum by
scipy.optimize.minimize_scalar (bounded) on a bracket around a fine grid's best
point, the minimum at an end of the interval (each level's probability is
unimodal in x), with log P from scipy.special.log_ndtr / the logistic logcdf.
"""
import json
import math

import numpy as np
import scipy
from scipy import integrate, optimize, stats

CASES = [
    {"noise": "gaussian", "scale": 0.3, "bounds": [1.0, 2.0]},
    {"noise": "logistic", "scale": 0.2, "bounds": [0.5, 1.0, 2.0, 4.0]},
    {"noise": "gaussian", "scale": 0.1, "bounds": [0.5, 1.0, 1.5, 2.0, 3.0, 4.5, 6.5]},
]
DENSITIES = {
    "uniform_0_4": (lambda x: 0.25, 0.0, 4.0),
    # exponential with mean 0.8 kW truncated to [0, 6] kW
    "exponential_0.8_to_6": (lambda x: math.exp(-x / 0.8) / (0.8 * (1 - math.exp(-6 / 0.8))), 0.0, 6.0),
}


def dist(case):
    return stats.norm if case["noise"] == "gaussian" else stats.logistic


def prob(case, level, x):
    d, s, b = dist(case), case["scale"], case["bounds"]
    lo = -math.inf if level == 0 else b[level - 1]
    hi = math.inf if level == len(b) else b[level]
    # P(lo <= x + e < hi) = F((hi - x)/s) - F((lo - x)/s), by survival functions where smaller.
    return math.exp(logprob(case, level, x))


def logprob(case, level, x):
    d, s, b = dist(case), case["scale"], case["bounds"]
    lo = -math.inf if level == 0 else b[level - 1]
    hi = math.inf if level == len(b) else b[level]
    a, c = (lo - x) / s, (hi - x) / s
    if lo == -math.inf:
        return d.logcdf(c)
    if hi == math.inf:
        return d.logsf(a)
    # log(F(c) - F(a)) stably: the smaller tail difference.
    if a > 0:
        la, lc = d.logsf(c), d.logsf(a)
        return lc + math.log1p(-math.exp(la - lc))
    la, lc = d.logcdf(a), d.logcdf(c)
    return lc + math.log1p(-math.exp(la - lc))


def mutual_information(case, density):
    p, lo, hi = density
    k = len(case["bounds"]) + 1
    edges = sorted(set([lo, hi] + [b for b in case["bounds"] if lo < b < hi]))
    quad = lambda f: sum(integrate.quad(f, a, b, limit=200, epsabs=1e-13, epsrel=1e-11)[0] for a, b in zip(edges, edges[1:]))
    marg = [quad(lambda x, l=l: p(x) * prob(case, l, x)) for l in range(k)]
    total = 0.0
    for l in range(k):
        if marg[l] <= 0:
            continue
        def f(x, l=l):
            q = prob(case, l, x)
            return p(x) * q * math.log2(q / marg[l]) if q > 0 else 0.0
        total += quad(f)
    return total


def epsilon(case, lo, hi):
    k = len(case["bounds"]) + 1
    grid = np.linspace(lo, hi, 2001)
    best = 0.0
    for l in range(k):
        vals = [logprob(case, l, x) for x in grid]
        i = int(np.argmax(vals))
        a, b = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        r = optimize.minimize_scalar(lambda x: -logprob(case, l, x), bounds=(a, b), method="bounded", options={"xatol": 1e-12})
        mx = max(-r.fun, vals[i])
        mn = min(logprob(case, l, lo), logprob(case, l, hi))
        best = max(best, mx - mn)
    return best


def main():
    out = {"scipy": scipy.__version__, "cases": []}
    for c in CASES:
        row = dict(c)
        row["mutual_information_bits"] = {name: mutual_information(c, d) for name, d in DENSITIES.items()}
        row["epsilon"] = {"0_4": epsilon(c, 0.0, 4.0), "0_15": epsilon(c, 0.0, 15.0)}
        out["cases"].append(row)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
