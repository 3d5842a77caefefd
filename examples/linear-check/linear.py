"""A linear model with Gaussian noise, for checking calibration against an
exact answer: y = 2 x1 + x2 + e, e ~ N(0, 0.01^2); x3 is read and ignored.

Reads the run's JSON from standard input (docs/simulators.md) and prints
{"y": ...} as its last line. Standard library only.
"""
import json
import random
import sys

run = json.loads(sys.stdin.readline())
x = run["inputs"]
noise = random.Random(run["seed"]).gauss(0.0, 0.01)
print(json.dumps({"y": 2.0 * x["x1"] + 1.0 * x["x2"] + noise}))
