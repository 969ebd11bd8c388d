#!/usr/bin/env python3
"""scikit-learn's decision tree as a lossprism `external` estimator (protocol version 1,
docs/external-protocol.md). Needs numpy and scikit-learn; the knob is `max_depth`.

scikit-learn cannot read a shallower tree off a deep one, so this fits one tree per grid value
(the cost grows with the grid length). `random_state=0` fixes the tie-breaking among equally
good splits, so fits are deterministic, as lossprism requires.

Scenario:
    [model]
    family = "external"
    command = ["python3", "sklearn_tree.py"]
    knob = "max_depth"
    grid = [1, 2, 4, 8]
"""
import sys

import numpy as np
from sklearn.tree import DecisionTreeClassifier, DecisionTreeRegressor


def read_rows(inp, tag, count):
    rows = []
    for _ in range(count):
        parts = inp.readline().split()
        if not parts or parts[0] != tag:
            raise SystemExit("expected a `%s` line" % tag)
        rows.append([float(t) for t in parts[1:]])
    return rows


def main():
    inp, out = sys.stdin, sys.stdout
    if inp.readline().split()[:1] != ["lossprism-external"]:
        return 2
    out.write("ready 1 sklearn_tree\n")
    out.flush()
    while True:
        line = inp.readline()
        if not line:
            return 0
        _, rid, task, _classes, _knob, n, p, m, g = line.split()
        n, p, m, g = int(n), int(p), int(m), int(g)
        grid = read_rows(inp, "grid", 1)[0]
        x = np.array(read_rows(inp, "x", n)).reshape(n, p)
        y = np.array(read_rows(inp, "y", 1)[0])
        ev = np.array(read_rows(inp, "eval", m)).reshape(m, p)
        if inp.readline().strip() != "end":
            return 2
        bad = [v for v in grid if v != int(v) or v < 1]
        if bad:
            out.write("error %s max_depth = %r must be a whole number >= 1\n" % (rid, bad[0]))
            out.flush()
            continue
        out.write("ok %s\n" % rid)
        for depth in grid:
            if task == "regress":
                model = DecisionTreeRegressor(max_depth=int(depth), random_state=0)
            else:
                model = DecisionTreeClassifier(max_depth=int(depth), random_state=0)
            pred = model.fit(x, y).predict(ev)
            out.write("pred " + " ".join(repr(float(v)) for v in pred) + "\n")
        out.flush()


if __name__ == "__main__":
    sys.exit(main())
