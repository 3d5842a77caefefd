#!/usr/bin/env python3
"""Reference values for the tessera-surrogate tests, computed with scipy and
scikit-learn. Writes JSON under surrogate/tests/fixtures/; the tests read the
committed files (CI has no Python).

Usage: python3 scripts/fixtures_surrogate.py [design|acquisition|gp|all]

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
    # The six-run design of REFERENCES.md, recomputed here.
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


if __name__ == "__main__":
    what = sys.argv[1] if len(sys.argv) > 1 else "all"
    if what in ("design", "all"):
        design()
    if what in ("acquisition", "all"):
        acquisition()
    if what in ("gp", "all") and "gp" in globals():
        globals()["gp"]()
