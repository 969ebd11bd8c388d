#!/usr/bin/env python3
"""k-nearest-neighbour estimator for lossprism's `external` family, standard library only.

Speaks protocol version 2 of docs/external-protocol.md on standard input/output (it ignores the
seed: k-NN has no randomness). The knob is
the number of neighbours k (whole numbers 1..n). It computes exactly what the built-in `knn`
family computes (with standardize = false):

- distances: squared Euclidean, accumulated input by input from left to right;
- neighbour order: by (squared distance, training row index), so of two rows at the same
  distance the earlier row comes first;
- regression: the running mean of the neighbours' responses, summed nearest first;
- classification: majority vote; among tied classes the one whose nearest member comes first;
  class probabilities (when asked) are the neighbour shares count_c / k.

Scenario:
    [model]
    family = "external"
    command = ["python3", "knn_stdlib.py"]
    knob = "k"
    grid = [1, 5, 20]
"""
import sys

VERSION = "2"


def numbers(line, tag):
    parts = line.split()
    if not parts or parts[0] != tag:
        raise ValueError("expected a `%s` line, got %r" % (tag, line[:40]))
    return [float(t) for t in parts[1:]]


def fit_predict(task, classes, x, y, ev, grid):
    n = len(x)
    p = len(x[0]) if n else 0
    ks = []
    for v in grid:
        if v != int(v) or v < 1 or v > n:
            raise ValueError("k = %r must be a whole number in 1..%d" % (v, n))
        ks.append(int(v))
    kmax = max(ks)
    cols = [[x[i][j] for i in range(n)] for j in range(p)]
    rows = [[] for _ in grid]
    probs = [[] for _ in grid]
    for q in ev:
        d = [0.0] * n
        for j in range(p):
            qj = q[j]
            col = cols[j]
            for i in range(n):
                t = col[i] - qj
                d[i] += t * t
        order = sorted(range(n), key=lambda i: (d[i], i))[:kmax]
        by_rank = []
        shares = []
        if task == "regress":
            s = 0.0
            for j, i in enumerate(order):
                s += y[i]
                by_rank.append(s / (j + 1))
        else:
            counts = {}
            first = {}
            leader = int(y[order[0]])
            for j, i in enumerate(order):
                c = int(y[i])
                if c not in counts:
                    counts[c] = 0
                    first[c] = j
                counts[c] += 1
                if counts[c] > counts.get(leader, 0) or (
                    counts[c] == counts.get(leader, 0) and first[c] < first.get(leader, j + 1)
                ):
                    leader = c
                by_rank.append(float(leader))
                shares.append([counts.get(cl, 0) / (j + 1) for cl in range(classes)])
        for g, k in enumerate(ks):
            rows[g].append(by_rank[k - 1])
            if shares:
                probs[g].extend(shares[k - 1])
    return rows, probs


def main():
    inp = sys.stdin
    out = sys.stdout
    hello = inp.readline().split()
    if hello[:1] != ["lossprism-external"]:
        sys.stderr.write("not a lossprism handshake: %r\n" % hello)
        return 2
    out.write("ready %s knn_stdlib\n" % VERSION)
    out.flush()
    while True:
        line = inp.readline()
        if not line:
            return 0  # end of input: lossprism is done
        head = line.split()
        if head[0] != "fit":
            sys.stderr.write("unexpected request %r\n" % line[:40])
            return 2
        # version 2 adds what to send (`values`, `labels` or `probs`) and a `seed` line
        _, rid, task, classes, _knob, n, p, m, g, want = head
        n, p, m, g, classes = int(n), int(p), int(m), int(g), int(classes)
        grid = numbers(inp.readline(), "grid")
        numbers(inp.readline(), "seed")  # k-NN has no randomness
        x = [numbers(inp.readline(), "x") for _ in range(n)]
        y = numbers(inp.readline(), "y")
        ev = [numbers(inp.readline(), "eval") for _ in range(m)]
        if inp.readline().strip() != "end":
            sys.stderr.write("request %s: missing `end`\n" % rid)
            return 2
        try:
            rows, probs = fit_predict(task, classes, x, y, ev, grid)
        except ValueError as e:
            out.write("error %s %s\n" % (rid, e))
            out.flush()
            continue
        out.write("ok %s\n" % rid)
        for g_i, r in enumerate(rows):
            out.write("pred " + " ".join(repr(v) for v in r) + "\n")
            if want == "probs":
                out.write("prob " + " ".join(repr(v) for v in probs[g_i]) + "\n")
        out.flush()


if __name__ == "__main__":
    sys.exit(main())
