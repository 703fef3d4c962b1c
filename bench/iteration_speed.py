"""Times one iteration of the numpy/scipy reference (tests/reference/recovery_iteration.py)
at a given size, with the same randomized truncation as the Rust code's steady
state (r + 10 columns, no extra subspace round), and prints one JSON line.

usage: iteration_speed.py M N RANK
"""
import json
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests", "reference"))
from recovery_iteration import iteration  # noqa: E402


def rsvd(w, rank, rng=np.random.default_rng(1)):
    k = min(rank + 10, *w.shape)
    q, _ = np.linalg.qr(w @ rng.standard_normal((w.shape[1], k)))
    ub, s, vt = np.linalg.svd(q.T @ w, full_matrices=False)
    return q @ ub, s, vt


def main():
    m, n, r = (int(a) for a in sys.argv[1:4])
    rng = np.random.default_rng(1)
    a = rng.random((m, r))
    t = (np.arange(n) % 96) / 96.0 * 2 * np.pi
    b = np.stack([(1 + np.sin(t * (k % 7 + 1) + k)) * 2.0 / r for k in range(r)])
    truth = a @ b
    levels = np.searchsorted([1.0, 2.0], truth + 0.3 * rng.standard_normal(truth.shape), side="right").astype(np.int64)
    levels[rng.random(truth.shape) < 0.05] = -1
    x = np.clip(truth * 0.9, 0, 15)
    x_prev = np.clip(truth * 0.85, 0, 15)
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        iteration(levels, x, x_prev, 2.0, r, 15.0, 0.3, [1.0, 2.0], svd=rsvd)
        times.append(time.perf_counter() - t0)
    times.sort()
    print(json.dumps({"m": m, "n": n, "rank": r, "numpy_iteration_s": times[1], "numpy": np.__version__}))


if __name__ == "__main__":
    main()
