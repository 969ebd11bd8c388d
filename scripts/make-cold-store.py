#!/usr/bin/env python3
"""Writes scenarios/data/cold-store.csv: an INVENTED table (not real measurements) for the
table-source example `scenarios/cold-store-table.toml`.

Stated process, one row per logged reading (300 rows, seed 20261202, Python's `random`):
  hour          ~ Uniform(0, 24)                       hour of day of the reading
  door_openings ~ Poisson(2 + 6 exp(-((hour - 12)/4)^2)) door openings in the previous hour
  load_tonnes   ~ Uniform(5, 40)                       goods in store
  compressor    = "A" or "B" with probability 1/2 each  which compressor was running (text)
  temp_c = -18 + 2.5 (1 - exp(-door_openings/4)) + 0.04 load_tonnes
           + 0.8 sin(2 pi (hour - 15)/24) + 0.6 [compressor = "B"] + N(0, 0.5^2)
So the true noise variance is 0.25 (degrees C squared).

Run from the repository root: python3 scripts/make-cold-store.py
"""
import csv
import math
import os
import random

ROWS = 300
SEED = 20261202
NOISE_SD = 0.5


def poisson(rng, lam):
    # Knuth's multiplication method; fine for small rates.
    limit, k, p = math.exp(-lam), 0, 1.0
    while True:
        p *= rng.random()
        if p <= limit:
            return k
        k += 1


def main():
    rng = random.Random(SEED)
    here = os.path.dirname(os.path.abspath(__file__))
    out = os.path.join(here, "..", "scenarios", "data", "cold-store.csv")
    with open(out, "w", newline="") as f:
        w = csv.writer(f, lineterminator="\n")
        w.writerow(["hour", "door_openings", "load_tonnes", "compressor", "temp_c"])
        for _ in range(ROWS):
            hour = rng.uniform(0.0, 24.0)
            doors = poisson(rng, 2.0 + 6.0 * math.exp(-(((hour - 12.0) / 4.0) ** 2)))
            load = rng.uniform(5.0, 40.0)
            comp = "A" if rng.random() < 0.5 else "B"
            temp = (
                -18.0
                + 2.5 * (1.0 - math.exp(-doors / 4.0))
                + 0.04 * load
                + 0.8 * math.sin(2.0 * math.pi * (hour - 15.0) / 24.0)
                + (0.6 if comp == "B" else 0.0)
                + rng.gauss(0.0, NOISE_SD)
            )
            w.writerow([f"{hour:.2f}", doors, f"{load:.1f}", comp, f"{temp:.2f}"])


if __name__ == "__main__":
    main()
