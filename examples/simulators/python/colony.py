#!/usr/bin/env python3
"""A minimal external simulator for tessera (Python 3 standard library only).

A toy stochastic model: a colony starts with `start_cells` cells; each cell
divides at `division_rate` per hour and dies at `death_rate` per hour
(a birth-death process simulated exactly, event by event). After `duration_h`
hours it reports the number of cells and the net growth rate.

The tessera contract (docs/simulators.md), as used here:
  * inputs arrive as one JSON object on stdin: {"inputs": {...}, "seed": ..., ...}
    (they are also in the environment as TESSERA_PARAM_<NAME>);
  * metrics are printed as one JSON object on the LAST line of stdout;
  * progress messages go to stderr (tessera keeps the last 4 KiB on failure);
  * a non-zero exit code marks the run as failed.

Try it by hand:
  echo '{"inputs": {"division_rate": 0.05}, "seed": 1}' | python3 colony.py
With tessera:
  tessera simulate colony division_rate=0.05 --command colony='python3 colony.py'
"""

import json
import math
import random
import sys

DEFAULTS = {"division_rate": 0.04, "death_rate": 0.01, "duration_h": 48.0, "start_cells": 10}


def main() -> int:
    request = json.load(sys.stdin)
    inputs = dict(DEFAULTS)
    for name, value in request.get("inputs", {}).items():
        if name not in DEFAULTS:
            print(f"unknown input {name!r}; valid: {', '.join(DEFAULTS)}", file=sys.stderr)
            return 2
        inputs[name] = float(value)
    if inputs["division_rate"] < 0 or inputs["death_rate"] < 0 or inputs["duration_h"] < 0:
        print("rates and duration must not be negative", file=sys.stderr)
        return 2

    rng = random.Random(request.get("seed", 0))
    cells = int(inputs["start_cells"])
    t = 0.0
    while cells > 0 and cells < 1_000_000:
        total_rate = cells * (inputs["division_rate"] + inputs["death_rate"])
        if total_rate == 0:
            break
        t += rng.expovariate(total_rate)
        if t > inputs["duration_h"]:
            break
        if rng.random() * (inputs["division_rate"] + inputs["death_rate"]) < inputs["division_rate"]:
            cells += 1
        else:
            cells -= 1
    print(f"finished at {cells} cells", file=sys.stderr)

    start = int(inputs["start_cells"])
    growth = math.log(cells / start) / inputs["duration_h"] if cells > 0 and inputs["duration_h"] > 0 else -1.0
    print(json.dumps({"final_cells": cells, "net_growth_per_h": growth}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
