#!/usr/bin/env python3
"""The side-by-side baseline: the bias-variance decomposition that `lossprism run` computes for
scenarios/friedman1-tree.toml, scenarios/friedman1-knn.toml, benches/compare/friedman1-forest.toml
and benches/compare/friedman1-boost.toml, done the way a practitioner would without the tool: a
plain Python loop with numpy and scikit-learn.

Same work as lossprism: Friedman #1 (Friedman 1991, Annals of Statistics 19:1-67),
f(x) = 10 sin(pi x1 x2) + 20 (x3 - 0.5)^2 + 10 x4 + 5 x5 with x ~ U[0,1]^10 and Gaussian noise
of sd 1; n = 500 training rows drawn afresh for every replicate (random design), m = 1000
evaluation points drawn once, R replicates (default 200; the ensembles are run with R = 100); one
model fitted per replicate and grid value (depth 1..12 for DecisionTreeRegressor, k in
1,2,3,5,8,12,20,30,50 for KNeighborsRegressor), predictions stored. The ensembles are fitted once
per replicate at the largest grid value and read along the grid, as lossprism does:
RandomForestRegressor(n_estimators=100, max_features=1/3 (3 of the 10 inputs, lossprism's
default), bootstrap) with every tree's predictions averaged over the first T trees for
T in 1,2,5,10,20,50,100; GradientBoostingRegressor(n_estimators=200, max_depth=3,
learning_rate=0.1) with staged_predict read after 1,2,5,10,20,50,100,200 rounds. Then per grid
value (ESL 2nd ed., eq. 7.9):
  variance V = mean over points of the unbiased replicate variance (divisor R - 1),
  bias^2   B = mean over points of (mean prediction - f)^2 - V/R (unbiased),
  noise    N = 1, expected loss = N + B + V.
The random numbers differ from lossprism's (numpy's generator, not ChaCha8), so the numbers agree
only up to Monte Carlo error; the work done is the same.

Usage: practitioner_loop.py tree|knn|forest|boost [--replicates R] [--seed S] [--json FILE]
"""

import argparse
import json
import sys

import numpy as np
from sklearn.neighbors import KNeighborsRegressor
from sklearn.ensemble import GradientBoostingRegressor, RandomForestRegressor
from sklearn.tree import DecisionTreeRegressor

N_TRAIN, N_EVAL, P = 500, 1000, 10
DEPTHS = list(range(1, 13))
KS = [1, 2, 3, 5, 8, 12, 20, 30, 50]
TREES = [1, 2, 5, 10, 20, 50, 100]
ROUNDS = [1, 2, 5, 10, 20, 50, 100, 200]


def friedman1(x):
    """Friedman #1 truth on the first five columns (the other five carry no signal)."""
    return (10 * np.sin(np.pi * x[:, 0] * x[:, 1]) + 20 * (x[:, 2] - 0.5) ** 2
            + 10 * x[:, 3] + 5 * x[:, 4])


def model_for(workload, value):
    if workload == "tree":
        return DecisionTreeRegressor(max_depth=value, random_state=0)
    return KNeighborsRegressor(n_neighbors=value)


def forest_curve(x, y, x_eval, seed):
    """One forest of the most trees; the forest of the first T trees at every grid value T."""
    rf = RandomForestRegressor(n_estimators=TREES[-1], max_features=1 / 3, random_state=seed)
    rf.fit(x, y)
    per_tree = np.stack([t.predict(x_eval) for t in rf.estimators_])
    running = np.cumsum(per_tree, axis=0)
    return np.stack([running[t - 1] / t for t in TREES])


def boost_curve(x, y, x_eval, seed):
    """One boosted model of the most rounds; its staged predictions at every grid value."""
    gb = GradientBoostingRegressor(n_estimators=ROUNDS[-1], max_depth=3, learning_rate=0.1,
                                   random_state=seed)
    gb.fit(x, y)
    wanted = set(ROUNDS)
    return np.stack([p for i, p in enumerate(gb.staged_predict(x_eval), start=1) if i in wanted])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("workload", choices=["tree", "knn", "forest", "boost"])
    ap.add_argument("--replicates", type=int, default=None,
                    help="default 200 (tree, knn) or 100 (forest, boost)")
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--json", help="write the decomposition here")
    a = ap.parse_args()
    grid = {"tree": DEPTHS, "knn": KS, "forest": TREES, "boost": ROUNDS}[a.workload]
    R = a.replicates or (100 if a.workload in ("forest", "boost") else 200)

    rng = np.random.default_rng(a.seed)
    x_eval = rng.uniform(size=(N_EVAL, P))
    f_eval = friedman1(x_eval)

    preds = np.empty((R, len(grid), N_EVAL))
    for r in range(R):
        x = rng.uniform(size=(N_TRAIN, P))
        y = friedman1(x) + rng.normal(size=N_TRAIN)
        if a.workload == "forest":
            preds[r] = forest_curve(x, y, x_eval, r)
        elif a.workload == "boost":
            preds[r] = boost_curve(x, y, x_eval, r)
        else:
            for g, value in enumerate(grid):
                preds[r, g] = model_for(a.workload, value).fit(x, y).predict(x_eval)

    mean = preds.mean(axis=0)                      # grid x points
    var = preds.var(axis=0, ddof=1)                # unbiased
    bias_sq = (mean - f_eval) ** 2 - var / R       # unbiased squared bias
    rows = []
    for g, value in enumerate(grid):
        b, v = float(bias_sq[g].mean()), float(var[g].mean())
        rows.append({"value": value, "bias_sq": b, "variance": v, "noise": 1.0,
                     "expected_loss": 1.0 + b + v})
    doc = {"workload": a.workload, "replicates": R, "points": rows}
    if a.json:
        with open(a.json, "w") as fh:
            json.dump(doc, fh, indent=1)
    else:
        for row in rows:
            print(f"{row['value']:>4}  loss {row['expected_loss']:8.4f}  bias² {row['bias_sq']:8.4f}"
                  f"  variance {row['variance']:8.4f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
