#!/usr/bin/env python3
"""Reference values for tessera's calibration checks. Writes JSON files the
Rust tests read (CI has no Python):

- surrogate/tests/fixtures/mcmc_arviz.json: fixed chains and their
  rank-normalised split R-hat and bulk ESS from ArviZ (Vehtari et al. 2021).
- surrogate/tests/fixtures/ks_scipy.json: samples and scipy's asymptotic
  one-sample Kolmogorov-Smirnov statistic and p-value against U(0, 1).
- tests/fixtures/linear_posterior.json: the exact posterior of the
  linear-model check (examples/linear-check), by quadrature over the box.

Usage: python3 scripts/fixtures_calibration.py [mcmc|ks|linear|all]
Each JSON file records the library versions that produced it.
"""
import json
import os
import sys

import numpy as np
import scipy
from scipy import stats

ROOT = os.path.join(os.path.dirname(__file__), "..")


def write(path, obj):
    full = os.path.join(ROOT, path)
    os.makedirs(os.path.dirname(full), exist_ok=True)
    with open(full, "w") as f:
        json.dump(obj, f, indent=1)
    print("wrote", path)


def ar1(rng, chains, draws, phi, shift=None, tails=None):
    out = np.zeros((chains, draws))
    for c in range(chains):
        x = 0.0
        for t in range(draws):
            e = rng.standard_t(tails) if tails else rng.standard_normal()
            x = phi * x + e
            out[c, t] = x
    if shift is not None:
        out[0] += shift
    return out


def mcmc():
    import arviz as az

    rng = np.random.default_rng(20261202)
    cases = {
        "ar09_4x1000": ar1(rng, 4, 1000, 0.9),
        "shifted_4x500": ar1(rng, 4, 500, 0.5, shift=1.5),
        "heavy_8x301": ar1(rng, 8, 301, 0.5, tails=3),
        "iid_16x200": rng.standard_normal((16, 200)),
    }
    out = []
    for name, ch in cases.items():
        out.append(
            {
                "name": name,
                "chains": ch.tolist(),
                "rhat_rank": float(az.rhat(ch, method="rank")),
                "ess_bulk": float(az.ess(ch, method="bulk")),
            }
        )
    write(
        "surrogate/tests/fixtures/mcmc_arviz.json",
        {"versions": {"numpy": np.__version__, "arviz": az.__version__}, "cases": out},
    )


def ks():
    rng = np.random.default_rng(7)
    cases = []
    for name, x in [
        ("uniform_200", rng.uniform(size=200)),
        ("beta22_500", rng.beta(2.0, 2.0, size=500)),
        ("uniform_ties_50", np.round(rng.uniform(size=50), 2)),
    ]:
        r = stats.kstest(x, "uniform", method="asymp")
        cases.append({"name": name, "x": x.tolist(), "d": float(r.statistic), "p": float(r.pvalue)})
    write(
        "surrogate/tests/fixtures/ks_scipy.json",
        {"versions": {"numpy": np.__version__, "scipy": scipy.__version__}, "cases": cases},
    )


def linear():
    # examples/linear-check: y = a x1 + b x2 (+ noise the surrogate averages
    # out), x3 ignored; target z with sd; uniform prior on [0, 1]^3.
    a, b, z, sd = 2.0, 1.0, 1.5, 0.15
    n = 4001
    g = np.linspace(0.0, 1.0, n)
    w = np.ones(n)
    w[1:-1:2] = 4.0
    w[2:-1:2] = 2.0
    w /= w.sum()  # Simpson weights on [0, 1] (n odd), normalised
    x1, x2 = np.meshgrid(g, g, indexing="ij")
    W = np.outer(w, w)
    dens = np.exp(-0.5 * ((a * x1 + b * x2 - z) / sd) ** 2) * W
    dens /= dens.sum()
    m1 = (dens * x1).sum()
    m2 = (dens * x2).sum()
    v1 = (dens * (x1 - m1) ** 2).sum()
    v2 = (dens * (x2 - m2) ** 2).sum()
    c12 = (dens * (x1 - m1) * (x2 - m2)).sum()
    inside = (np.abs(a * x1 + b * x2 - z) <= 3.0 * sd).astype(float)
    frac = (inside * W).sum()
    write(
        "tests/fixtures/linear_posterior.json",
        {
            "versions": {"numpy": np.__version__, "scipy": scipy.__version__},
            "model": {"a": a, "b": b, "z": z, "sd": sd, "box": [0.0, 1.0]},
            "grid": n,
            "x1": {"mean": m1, "sd": float(np.sqrt(v1))},
            "x2": {"mean": m2, "sd": float(np.sqrt(v2))},
            "x3": {"mean": 0.5, "sd": float(np.sqrt(1.0 / 12.0))},
            "corr_x1_x2": float(c12 / np.sqrt(v1 * v2)),
            "nroy_fraction": float(frac),
        },
    )


if __name__ == "__main__":
    what = sys.argv[1] if len(sys.argv) > 1 else "all"
    if what in ("mcmc", "all"):
        mcmc()
    if what in ("ks", "all"):
        ks()
    if what in ("linear", "all"):
        linear()
