#!/usr/bin/env python3
"""Fixture values for coordinator::seed (pure Python 3.11, no packages).

Writes coordinator/tests/fixtures/seed.json with
- the first outputs of SplitMix64 as published in Vigna's splitmix64.c
  (https://prng.di.unimi.it/splitmix64.c), ported line by line, for states
  0 and 1234567 (the Rosetta Code "Pseudo-random numbers/Splitmix64" task
  lists 6457827717110365317, 3203168211198807973, ... for 1234567);
- replicate seeds computed by an independent port of the formula documented
  in coordinator/src/seed.rs.
Run from the repository root: python3 scripts/fixtures_seed.py
"""
import json
import pathlib

M = (1 << 64) - 1
GAMMA = 0x9E3779B97F4A7C15


def mix(z):
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & M
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & M
    return z ^ (z >> 31)


def stream(x, n):
    out = []
    for _ in range(n):
        x = (x + GAMMA) & M
        out.append(mix(x))
    return out


def nth(state, k):
    return mix((state + GAMMA * k) & M)


def replicate_seed(sweep, point, rep):
    h = nth(sweep, 1)
    h = mix(h ^ nth(point, 2))
    h = mix(h ^ nth(rep, 3))
    return h >> 1


cases = [(s, p, r) for s in (0, 7, 2**63 - 1) for p in (0, 1, 59) for r in (0, 2)]
data = {
    "splitmix64": {str(x): [str(v) for v in stream(x, 5)] for x in (0, 1234567)},
    "replicate_seed": [
        {"sweep": str(s), "point": p, "replicate": r, "seed": str(replicate_seed(s, p, r))}
        for (s, p, r) in cases
    ],
}
out = pathlib.Path("coordinator/tests/fixtures/seed.json")
out.write_text(json.dumps(data, indent=1) + "\n")
print(f"wrote {out}")
