#!/usr/bin/env python3
"""Invented tables for the noise-refusal study (docs/noise-refusals.md): y = f(x) + Gaussian noise, f an invented smooth or stepped function. Standard library only.
usage: make-refusal-tables.py OUT.csv n p share fkind xkind seed
  fkind: smooth | step | const (y = noise only, f = 0)
  xkind: uniform | grid (full-factorial lattice, no repeated inputs) | lattice5 (5 levels, repeats)
         | int (integers 0..20) | cat (last input is text with 3 levels) | mistype (uniform, one value x1 *1000)
  share: noise variance / var(f) over the table's rows (0 = exact); with fkind const, sd = 1
"""
import sys, math, random, itertools, zlib

def make(n, p, share, fkind, xkind, seed):
    rng = random.Random(seed * 1000003 + n * 7919 + p * 131 + zlib.crc32(f'{fkind}|{xkind}|{share}'.encode()) % 100000)
    X = []
    ncat = 1 if xkind == "cat" else 0
    pn = p - ncat
    if xkind == "grid" and pn > 0:
        k = max(2, math.ceil(n ** (1.0 / pn) - 1e-9))
        lv = [i / (k - 1) for i in range(k)]
        allpts = list(itertools.product(lv, repeat=pn)) if k ** pn <= 2_000_000 else None
        if allpts is not None:
            pts = rng.sample(allpts, n)
        else:
            seen = set(); pts = []
            while len(pts) < n:
                t = tuple(rng.choice(lv) for _ in range(pn))
                if t not in seen: seen.add(t); pts.append(t)
        X = [list(t) for t in pts]
    else:
        for _ in range(n):
            if xkind == "lattice5":
                X.append([rng.randrange(5) / 4 for _ in range(pn)])
            elif xkind == "int":
                X.append([rng.randrange(21) for _ in range(pn)])
            else:
                X.append([rng.random() for _ in range(pn)])
    cats = [rng.choice("abc") for _ in range(n)] if ncat else None
    scale = 20.0 if xkind == "int" else 1.0
    def f(row, c):
        u = [v / scale for v in row]
        s = 0.0
        for j, v in enumerate(u):
            w = 1.0 / (1 + j)
            if j % 2 == 0:
                s += w * math.sin(2 * math.pi * v + j)
            else:
                s += w * 2 * (v - 0.5) ** 2 * 2
        if len(u) >= 2:
            s += 0.5 * u[0] * u[1]
        if fkind == "step" and u:
            s += 1.5 * (u[0] > 0.45)
        if c is not None:
            s += {"a": 0.0, "b": 0.8, "c": -0.5}[c]
        return s
    if fkind == "const":
        F = [0.0] * n; sd = 1.0
    else:
        F = [f(X[i], cats[i] if cats else None) for i in range(n)]
        m = sum(F) / n
        vf = sum((v - m) ** 2 for v in F) / n
        sd = math.sqrt(share * vf)
    Y = [F[i] + (rng.gauss(0, sd) if sd > 0 else 0.0) for i in range(n)]
    if xkind.startswith("mistype"):
        fac = float(xkind[7:] or 1000)
        i = rng.randrange(n); X[i][0] = X[i][0] * fac if X[i][0] > 0.05 else 0.5 * fac
    return X, cats, Y

def write(path, X, cats, Y):
    pn = len(X[0]) if X else 0
    with open(path, "w") as fh:
        hdr = [f"x{j+1}" for j in range(pn)] + (["grp"] if cats else []) + ["y"]
        fh.write(",".join(hdr) + "\n")
        for i in range(len(Y)):
            cells = [repr(v) if isinstance(v, float) else str(v) for v in X[i]]
            if cats: cells.append(cats[i])
            cells.append(repr(Y[i]))
            fh.write(",".join(cells) + "\n")

if __name__ == "__main__":
    out, n, p, share, fk, xk, seed = sys.argv[1:8]
    X, c, Y = make(int(n), int(p), float(share), fk, xk, int(seed))
    write(out, X, c, Y)
