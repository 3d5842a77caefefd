#!/usr/bin/env python3
"""scikit-learn timing for the same GP benchmark as surrogate/benches/gp_fit.rs.

Same data (d = 6 Kronecker-sequence inputs, Hartmann-6 plus 0.05 sin(1.3 i)),
same model (ConstantKernel * Matern(nu=2.5, ARD) + WhiteKernel, normalize_y,
the bounds of tessera_surrogate::gp::bounds()), the same first start
(s_f^2 = 1, l = 0.3 sqrt(d), nugget 1e-3) and 5 random restarts.

Usage: python3 scripts/bench_gp_sklearn.py [n1 n2 ...]
"""
import sys
import time

import numpy as np
import scipy
import sklearn
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

D = 6


def hartmann6(x):
    alpha = np.array([1.0, 1.2, 3.0, 3.2])
    A = np.array([[10, 3, 17, 3.5, 1.7, 8], [0.05, 10, 17, 0.1, 8, 14],
                  [3, 3.5, 1.7, 10, 17, 8], [17, 8, 0.05, 10, 0.1, 14]])
    P = 1e-4 * np.array([[1312, 1696, 5569, 124, 8283, 5886], [2329, 4135, 8307, 3736, 1004, 9991],
                         [2348, 1451, 3522, 2883, 3047, 6650], [4047, 8828, 8732, 5743, 1091, 381]])
    return -np.sum(alpha * np.exp(-np.sum(A * (x[:, None, :] - P) ** 2, axis=2)), axis=1)


def frac(v):
    return v - np.floor(v)


def data(n, offset):
    a = frac(np.sqrt(np.array([2.0, 3.0, 5.0, 7.0, 11.0, 13.0])))
    i = np.arange(offset, offset + n, dtype=float)
    x = frac(0.5 + i[:, None] * a[None, :])
    y = hartmann6(x) + 0.05 * np.sin(1.3 * i)
    return x, y


def model():
    k = ConstantKernel(1.0, constant_value_bounds=(1e-3, 1e3)) * Matern(
        length_scale=[0.3 * np.sqrt(D)] * D, nu=2.5, length_scale_bounds=(1e-2, 1e2)
    ) + WhiteKernel(1e-3, noise_level_bounds=(1e-8, 10.0))
    return GaussianProcessRegressor(k, normalize_y=True, n_restarts_optimizer=5, random_state=0)


def main():
    import os
    import warnings

    warnings.filterwarnings("ignore")
    sizes = [int(a) for a in sys.argv[1:]] or [100, 250, 500, 1000, 2000]
    print(f"scikit-learn {sklearn.__version__}, numpy {np.__version__}, scipy {scipy.__version__}, "
          f"{os.cpu_count()} cpus; n_restarts_optimizer=5")
    print("| n | fit (s) | LML |")
    print("|---|---|---|")
    for n in sizes:
        x, y = data(n, 0)
        g = model()
        t = time.perf_counter()
        g.fit(x, y)
        secs = time.perf_counter() - t
        print(f"| {n} | {secs:.3f} | {g.log_marginal_likelihood_value_:.3f} |", flush=True)
        if n == 1000:
            xs, _ = data(10_000, 100_000)
            times = []
            for _ in range(5):
                t = time.perf_counter()
                g.predict(xs, return_std=True)
                times.append(time.perf_counter() - t)
            times.sort()
            print(f"predict 10,000 points (mean and sd) from n = 1000: median {1e3 * times[2]:.1f} ms "
                  f"(min {1e3 * times[0]:.1f} ms) of 5", flush=True)


if __name__ == "__main__":
    main()
