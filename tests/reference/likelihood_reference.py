"""Reference values for the mechanism's log-likelihood, printed as JSON.

Independent of the Rust code: one-sided log-CDFs come from scipy.special.log_ndtr
and scipy.stats.logistic.logcdf; interval probabilities and their derivatives come
from mpmath at 60 significant digits, where no cancellation can occur.
"""
import json
import sys

import mpmath as mp
import scipy
from scipy import special, stats

mp.mp.dps = 60


def cdf(noise, z):
    if noise == "gaussian":
        return mp.ncdf(z)
    return 1 / (1 + mp.exp(-z))


def pdf(noise, z):
    if noise == "gaussian":
        return mp.npdf(z)
    e = mp.exp(-z)
    return e / (1 + e) ** 2


def interval(noise, scale, bounds, level, x):
    s = mp.mpf(scale)
    x = mp.mpf(x)
    lo = None if level == 0 else (mp.mpf(bounds[level - 1]) - x) / s
    hi = None if level == len(bounds) else (mp.mpf(bounds[level]) - x) / s
    # Both families are symmetric; taking the side away from the bulk means the
    # subtraction never cancels, whatever the precision.
    if (lo if lo is not None else -mp.inf) + (hi if hi is not None else mp.inf) > 0:
        p = (cdf(noise, -lo) if lo is not None else 1) - (cdf(noise, -hi) if hi is not None else 0)
    else:
        p = (cdf(noise, hi) if hi is not None else 1) - (cdf(noise, lo) if lo is not None else 0)
    dp = ((pdf(noise, lo) if lo is not None else 0) - (pdf(noise, hi) if hi is not None else 0)) / s
    return float(mp.log(p)), float(dp / p)


def main():
    zs = [-45.0, -40.0, -38.5, -30.0, -20.5, -19.5, -10.0, -5.0, -1.0, -1e-3, 0.0, 0.5, 3.0, 7.0, 12.0, 40.0]
    one_sided = [
        {"z": z, "log_ndtr": float(special.log_ndtr(z)), "log_logistic_cdf": float(stats.logistic.logcdf(z))}
        for z in zs
    ]
    cases = []
    profiles = [
        ("gaussian", 0.3, [1.0, 2.0]),
        ("logistic", 0.3, [1.0, 2.0]),
        ("gaussian", 0.05, [0.5, 1.0, 2.0, 4.0]),
        ("logistic", 0.05, [0.5, 1.0, 2.0, 4.0]),
        ("gaussian", 1.0, [1.0, 1.001]),
    ]
    xs = [-2.0, 0.0, 0.4, 0.999, 1.0, 1.0005, 1.5, 2.0, 3.3, 6.0, 9.0]
    for noise, scale, bounds in profiles:
        for level in range(len(bounds) + 1):
            for x in xs:
                lp, dlp = interval(noise, scale, bounds, level, x)
                cases.append({"noise": noise, "scale_kw": scale, "boundaries_kw": bounds,
                              "level": level, "x_kw": x, "log_p": lp, "dlog_p": dlp})
    json.dump({"scipy": scipy.__version__, "mpmath": mp.__version__,
               "one_sided": one_sided, "cases": cases}, sys.stdout)


if __name__ == "__main__":
    main()
