#!/usr/bin/env python3
"""Reference values for the tessera-surrogate tests, computed with scipy and
scikit-learn. Writes JSON under surrogate/tests/fixtures/; the tests read the
committed files (CI has no Python).

Usage: python3 scripts/fixtures_surrogate.py [design|acquisition|gp|bulk|holdout|all]

Each JSON file records the library versions that produced it.
"""
import json
import os
import sys

import numpy as np
import scipy
from scipy.stats import qmc

OUT = os.path.join(os.path.dirname(__file__), "..", "surrogate", "tests", "fixtures")


def versions():
    import sklearn

    return {
        "python": sys.version.split()[0],
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "sklearn": sklearn.__version__,
    }


def phi_p(x, p):
    """Morris & Mitchell (1995) phi_p, computed with a scaled sum."""
    from scipy.spatial.distance import pdist

    d = pdist(x)
    dmin = d.min()
    return (np.sum((d / dmin) ** (-p))) ** (1.0 / p) / dmin


def write(name, obj):
    os.makedirs(OUT, exist_ok=True)
    path = os.path.join(OUT, name)
    with open(path, "w") as f:
        json.dump(obj, f, indent=1)
        f.write("\n")
    print("wrote", os.path.normpath(path))


def design():
    """phi_p (p = 50) and CD^2 of scipy's optimised and plain Latin hypercubes."""
    from scipy.spatial.distance import pdist

    cases = []
    seeds = list(range(5))
    for n, d in [(10, 2), (20, 3), (30, 5), (60, 6)]:
        row = {"n": n, "d": d, "p": 50.0, "rngs": seeds}
        for label, opt in [("random_cd", "random-cd"), ("plain", None)]:
            phis, cds, mins = [], [], []
            for s in seeds:
                x = qmc.LatinHypercube(d, optimization=opt, rng=np.random.default_rng(s)).random(n)
                phis.append(phi_p(x, 50.0))
                cds.append(qmc.discrepancy(x, method="CD"))
                mins.append(pdist(x).min())
            row[label] = {
                "phi_p_mean": float(np.mean(phis)),
                "cd2_mean": float(np.mean(cds)),
                "min_distance_mean": float(np.mean(mins)),
            }
        cases.append(row)
    # The six-run design with ranks [[1,3],[2,6],[3,2],[4,5],[5,1],[6,4]], computed here.
    ranks = np.array([[1, 3], [2, 6], [3, 2], [4, 5], [5, 1], [6, 4]], dtype=float)
    x6 = (ranks - 0.5) / 6.0
    six = {
        "points": x6.tolist(),
        "cd2": float(qmc.discrepancy(x6, method="CD")),
        "min_distance": float(pdist(x6).min()),
        "phi_2": float(phi_p(x6, 2.0)),
        "phi_5": float(phi_p(x6, 5.0)),
        "phi_50": float(phi_p(x6, 50.0)),
    }
    # A random (non-Latin) point set: CD^2 must match scipy to rounding.
    xr = np.random.default_rng(7).random((25, 4))
    rand_set = {"points": xr.tolist(), "cd2": float(qmc.discrepancy(xr, method="CD"))}
    write(
        "design_scipy.json",
        {"versions": versions(), "cases": cases, "six_run": six, "random_points": rand_set},
    )


def acquisition():
    """Expected improvement (minimisation, Jones, Schonlau & Welch 1998) in
    50-digit arithmetic with mpmath, including the far lower tail."""
    import mpmath

    mpmath.mp.dps = 50
    cases = []
    for f_best, mu, sigma in [
        (0.0, 0.5, 1.0), (0.0, 0.0, 1.0), (0.0, -1.0, 1.0), (0.0, 1.0, 1.0),
        (0.0, 0.5, 2.0), (0.0, 2.0, 0.5), (1.3, 0.2, 0.7), (0.0, 9.5, 1.0),
        (0.0, 10.5, 1.0), (0.0, 12.0, 1.0), (0.0, 20.0, 1.0), (0.0, 35.0, 1.0),
        (2.0, -30.0, 1.0), (0.0, 3.0, 1e-3),
    ]:
        g = mpmath.mpf(f_best) - mpmath.mpf(mu)
        sg = mpmath.mpf(sigma)
        z = g / sg
        ei = g * mpmath.ncdf(z) + sg * mpmath.npdf(z)
        cases.append({"f_best": f_best, "mu": mu, "sigma": sigma, "ei": float(ei)})
    cdf = [{"z": z, "cdf": float(mpmath.ncdf(z))} for z in [-30.0, -8.0, -3.0, -1.0, 0.5, 1.959963984540054, 4.0]]
    write(
        "ei_mpmath.json",
        {"versions": {"mpmath": mpmath.__version__}, "cases": cases, "normal_cdf": cdf},
    )


# Bounds shared with tessera_surrogate::gp::bounds() (standardised outputs,
# unit-cube inputs), so both optimisers search the same box.
SIGNAL_BOUNDS = (1e-3, 1e5)
LENGTH_BOUNDS = (1e-2, 1e3)
NUGGET_BOUNDS = (1e-8, 10.0)


def branin_unit(u):
    """Branin on [-5,10] x [0,15] (Surjanovic & Bingham), inputs in [0,1]^2."""
    x1 = -5.0 + 15.0 * u[:, 0]
    x2 = 15.0 * u[:, 1]
    b = 5.1 / (4 * np.pi**2)
    c = 5 / np.pi
    t = 1 / (8 * np.pi)
    return (x2 - b * x1**2 + c * x1 - 6) ** 2 + 10 * (1 - t) * np.cos(x1) + 10


def hartmann6(x):
    """Hartmann-6 on [0,1]^6 (Surjanovic & Bingham)."""
    alpha = np.array([1.0, 1.2, 3.0, 3.2])
    A = np.array([[10, 3, 17, 3.5, 1.7, 8], [0.05, 10, 17, 0.1, 8, 14],
                  [3, 3.5, 1.7, 10, 17, 8], [17, 8, 0.05, 10, 0.1, 14]])
    P = 1e-4 * np.array([[1312, 1696, 5569, 124, 8283, 5886], [2329, 4135, 8307, 3736, 1004, 9991],
                         [2348, 1451, 3522, 2883, 3047, 6650], [4047, 8828, 8732, 5743, 1091, 381]])
    return -np.sum(alpha * np.exp(-np.sum(A * (x[:, None, :] - P) ** 2, axis=2)), axis=1)


def sk_kernel(kind, c, l, w, fixed):
    from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern, WhiteKernel

    cb = "fixed" if fixed else SIGNAL_BOUNDS
    lb = "fixed" if fixed else LENGTH_BOUNDS
    wb = "fixed" if fixed else NUGGET_BOUNDS
    base = Matern(length_scale=l, nu=2.5, length_scale_bounds=lb) if kind == "matern52" \
        else RBF(length_scale=l, length_scale_bounds=lb)
    return ConstantKernel(c, constant_value_bounds=cb) * base + WhiteKernel(w, noise_level_bounds=wb)


def sk_hyper(k):
    """(signal_var, lengthscales, nugget) of a fitted sum kernel."""
    return float(k.k1.k1.constant_value), np.atleast_1d(k.k1.k2.length_scale).tolist(), float(k.k2.noise_level)


def gp():
    """scikit-learn GaussianProcessRegressor references: ConstantKernel * Matern(nu=2.5, ARD)
    + WhiteKernel, normalize_y=True."""
    from sklearn.gaussian_process import GaussianProcessRegressor

    rng = np.random.default_rng(11)
    n, d = 25, 3
    X = rng.random((n, d))
    y = np.sin(3 * X[:, 0]) + X[:, 1] ** 2 - 0.5 * X[:, 2] + 0.05 * rng.standard_normal(n)
    noise_var = 0.002 * rng.random(n)  # known per-point noise, natural units
    Xs = rng.random((15, d))
    ystd = np.std(y)
    fixed = []
    for kind in ["matern52", "se"]:
        c, l, w = 1.3, [0.4, 0.7, 1.1], 1e-3
        g = GaussianProcessRegressor(sk_kernel(kind, c, l, w, True), alpha=noise_var / ystd**2,
                                     normalize_y=True, optimizer=None).fit(X, y)
        mean, sd_obs = g.predict(Xs, return_std=True)
        sd_f = np.sqrt(np.maximum(sd_obs**2 - w * ystd**2, 0.0))
        fixed.append({
            "kernel": kind, "signal_var": c, "lengthscales": l, "nugget": w,
            "lml": float(g.log_marginal_likelihood_value_),
            "mean": mean.tolist(), "sd": sd_f.tolist(), "sd_obs": sd_obs.tolist(),
        })
    # Optimised: same data, 5 restarts.
    g = GaussianProcessRegressor(sk_kernel("matern52", 1.0, [0.3 * np.sqrt(d)] * d, 1e-3, False),
                                 alpha=noise_var / ystd**2, normalize_y=True,
                                 n_restarts_optimizer=5, random_state=0).fit(X, y)
    c, l, w = sk_hyper(g.kernel_)
    optimised = {"lml": float(g.log_marginal_likelihood_value_), "signal_var": c, "lengthscales": l, "nugget": w}

    # Out-of-sample accuracy on Branin and Hartmann-6: 10 d training points
    # (scipy LHS), 500 uniform test points.
    tests = []
    for name, f, dd in [("branin", branin_unit, 2), ("hartmann6", hartmann6, 6)]:
        ntr = 10 * dd
        Xtr = qmc.LatinHypercube(dd, rng=np.random.default_rng(5)).random(ntr)
        Xte = np.random.default_rng(6).random((500, dd))
        ytr, yte = f(Xtr), f(Xte)
        g = GaussianProcessRegressor(sk_kernel("matern52", 1.0, [0.3 * np.sqrt(dd)] * dd, 1e-3, False),
                                     normalize_y=True, n_restarts_optimizer=5, random_state=0).fit(Xtr, ytr)
        mu, sd = g.predict(Xte, return_std=True)
        c, l, w = sk_hyper(g.kernel_)
        tests.append({
            "name": name, "x_train": Xtr.tolist(), "y_train": ytr.tolist(),
            "x_test": Xte.tolist(), "y_test": yte.tolist(),
            "sklearn_rmse": float(np.sqrt(np.mean((mu - yte) ** 2))),
            "sklearn_coverage95": float(np.mean(np.abs(mu - yte) <= 1.959963984540054 * sd)),
            "sklearn_lml": float(g.log_marginal_likelihood_value_),
            "sklearn_hyper": {"signal_var": c, "lengthscales": l, "nugget": w},
        })

    # Six-point sin(2 pi x) fixture, no output scaling.
    X6 = np.linspace(0, 1, 6)[:, None]
    y6 = np.sin(2 * np.pi * X6[:, 0])
    g6 = GaussianProcessRegressor(sk_kernel("matern52", 1.5, 0.3, 0.01, True), alpha=0.0,
                                  optimizer=None).fit(X6, y6)
    xs6 = np.array([[0.1], [0.45], [0.9]])
    m6, s6 = g6.predict(xs6, return_std=True)
    six = {"lml": float(g6.log_marginal_likelihood_value_), "mean": m6.tolist(),
           "sd": np.sqrt(s6**2 - 0.01).tolist(), "sd_obs": s6.tolist()}

    write("gp_sklearn.json", {
        "versions": versions(),
        "data": {"x": X.tolist(), "y": y.tolist(), "noise_var": noise_var.tolist(), "x_star": Xs.tolist()},
        "fixed": fixed, "optimised": optimised, "bounds": {
            "signal_var": SIGNAL_BOUNDS, "lengthscale": LENGTH_BOUNDS, "nugget": NUGGET_BOUNDS},
        "out_of_sample": tests, "six_point": six,
    })


def kronecker(n, offset, d=6):
    """x_ik = frac(0.5 + i a_k), a_k = frac(sqrt(p_k)), i = offset .. offset + n - 1:
    the same floating-point operations as the Rust tests, so the same bits."""
    primes = np.array([2.0, 3.0, 5.0, 7.0, 11.0, 13.0])[:d]
    a = np.sqrt(primes)
    a = a - np.floor(a)
    i = np.arange(offset, offset + n, dtype=np.float64)[:, None]
    v = 0.5 + i * a
    return v - np.floor(v)


def gp_bulk():
    """Predictions at many points from a larger GP (n = 300, m = 740), where
    tessera's batched prediction takes its single-precision path: fixed
    hyperparameters, ConstantKernel * Matern(nu=2.5, ARD), alpha = nugget
    (so the returned std is the latent f's), normalize_y=True."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    n = 300
    X = kronecker(n, 0)
    y = hartmann6(X) + 0.05 * np.sin(1.3 * np.arange(n))
    # 640 new points and the first 100 training points (posterior sd near 0 there).
    Xs = np.vstack([kronecker(640, 100_000), X[:100]])
    c, l, w = 1.4, [0.49, 0.62, 1.13, 0.55, 0.50, 0.49], 1e-6
    k = ConstantKernel(c, constant_value_bounds="fixed") * Matern(l, nu=2.5, length_scale_bounds="fixed")
    g = GaussianProcessRegressor(k, alpha=w, normalize_y=True, optimizer=None).fit(X, y)
    mean, sd = g.predict(Xs, return_std=True)
    write("gp_bulk_sklearn.json", {
        "versions": versions(),
        "n": n, "test_offset": 100_000, "test_new": 640, "test_train": 100,
        "x_sum": float(X.sum()), "x_star_sum": float(Xs.sum()),
        "signal_var": c, "lengthscales": l, "nugget": w,
        "y": y.tolist(), "mean": mean.tolist(), "sd": sd.tolist(),
    })


def holdout():
    """Out-of-sample accuracy of scikit-learn's GaussianProcessRegressor with
    its default bounds on deterministic Branin data: 40-point Latin
    hypercubes (scipy, seeds 9 to 14) in the unit square, 60 uniform
    held-out points each. Kernel ConstantKernel * Matern(nu=2.5, ARD) +
    WhiteKernel, normalize_y=True, 5 restarts."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

    cases = []
    for seed in range(9, 15):
        Xtr = qmc.LatinHypercube(2, rng=np.random.default_rng(seed)).random(40)
        Xte = np.random.default_rng(seed + 100).random((60, 2))
        ytr, yte = branin_unit(Xtr), branin_unit(Xte)
        k = ConstantKernel(1.0) * Matern(length_scale=[1.0, 1.0], nu=2.5) + WhiteKernel()
        g = GaussianProcessRegressor(k, normalize_y=True, n_restarts_optimizer=5,
                                     random_state=0).fit(Xtr, ytr)
        mu, sd = g.predict(Xte, return_std=True)
        c, l, w = sk_hyper(g.kernel_)
        cases.append({
            "seed": seed, "x_train": Xtr.tolist(), "y_train": ytr.tolist(),
            "x_test": Xte.tolist(), "y_test": yte.tolist(),
            "sklearn_rmse": float(np.sqrt(np.mean((mu - yte) ** 2))),
            "sklearn_coverage95": float(np.mean(np.abs(mu - yte) <= 1.959963984540054 * sd)),
            "sklearn_hyper": {"signal_var": c, "lengthscales": l, "nugget": w},
        })
    write("gp_holdout_sklearn.json", {"versions": versions(), "cases": cases})


if __name__ == "__main__":
    what = sys.argv[1] if len(sys.argv) > 1 else "all"
    if what in ("holdout", "all"):
        holdout()
    if what in ("design", "all"):
        design()
    if what in ("acquisition", "all"):
        acquisition()
    if what in ("gp", "all"):
        gp()
    if what in ("bulk", "all"):
        gp_bulk()
