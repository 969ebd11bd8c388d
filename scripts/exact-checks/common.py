"""Shared helpers: run lossprism for many seeds and compare every term with an exact truth."""
import json, math, os, subprocess, sys, tempfile

BIN = os.environ.get("LOSSPRISM", os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "target", "release", "lossprism"))
HERE = os.path.dirname(os.path.abspath(__file__))

def run(scenario, seed, replicates=None, extra=(), points=False):
    """Run once; return (result dict, points rows or None)."""
    with tempfile.TemporaryDirectory() as td:
        out = os.path.join(td, "r.json"); pts = os.path.join(td, "p.csv")
        cmd = [BIN, "run", scenario, "--seed", str(seed), "--out", out, "--quiet"]
        if replicates: cmd += ["--replicates", str(replicates)]
        if points: cmd += ["--points", pts]
        cmd += list(extra)
        p = subprocess.run(cmd, capture_output=True, text=True)
        if p.returncode != 0:
            raise RuntimeError(f"{' '.join(cmd)} -> {p.returncode}: {p.stderr[-2000:]}")
        res = json.load(open(out))
        rows = None
        if points:
            import csv
            rows = list(csv.DictReader(open(pts)))
        return res, rows

def eval_points(scenario, seed=1):
    """Evaluation inputs as the tool wrote them (--points, first grid value)."""
    res, rows = run(scenario, seed, replicates=3, points=True)
    return res, rows

def dig(d, key):
    for k in key.split("."):
        if not isinstance(d, dict) or k not in d: return None
        d = d[k]
    return d

def sweep(name, scenario, truth, seeds, replicates=None, terms=None, extra=(), report_terms=None,
          se_key="stderr"):
    """truth: {knob value: {term: exact value}}.  For every (knob, term) collect the tool's
    estimate and SE over seeds; print mean estimate, truth, mean SE, sd of estimates over seeds,
    mean z, max |z|, coverage of +-2 SE."""
    coll = {}
    for s in seeds:
        res, _ = run(scenario, s, replicates)
        for pt in res["points"]:
            v = pt["value"]
            if v not in truth: continue
            for t, tv in truth[v].items():
                est = dig(pt, t)
                se = dig(pt.get(se_key, {}), t)
                iv = dig(pt.get("interval95", {}), t)
                coll.setdefault((v, t), []).append((est, se, tv, iv))
    lines = []
    print(f"== {name}: {len(seeds)} seeds, R = {replicates or 'file'}")
    print(f"{'knob':>8} {'term':<22} {'truth':>12} {'mean est':>12} {'mean SE':>10} {'sd(est)':>10} "
          f"{'z(mean)':>8} {'max|z|':>7} {'cov2SE':>7} {'covI95':>7}")
    summary = []
    for (v, t), xs in sorted(coll.items(), key=lambda kv: (kv[0][0], kv[0][1])):
        ests = [e for e, _, _, _ in xs]; tv = xs[0][2]
        ses = [se for _, se, _, _ in xs if se is not None]
        ivs = [iv for *_, iv in xs if iv is not None]
        m = sum(ests) / len(ests)
        sd = math.sqrt(sum((e - m) ** 2 for e in ests) / (len(ests) - 1)) if len(ests) > 1 else float('nan')
        if ses and len(ses) == len(ests):
            zs = [(e - tv) / se if se > 0 else (0.0 if e == tv else float('inf')) for e, se, _, _ in xs]
            mse = sum(ses) / len(ses)
            cov = sum(1 for z in zs if abs(z) <= 2) / len(zs)
            zmax = max(abs(z) for z in zs)
            # z of the mean over seeds using the spread across seeds (SE of mean = sd/sqrt(n))
            zmean = (m - tv) / (sd / math.sqrt(len(ests))) if sd > 0 else (0.0 if m == tv else float('inf'))
        else:
            mse = float('nan'); cov = float('nan'); zmax = float('nan'); zs = []
            zmean = (m - tv) / (sd / math.sqrt(len(ests))) if sd > 1e-14 else (0.0 if abs(m - tv) < 1e-12 else float('inf'))
        icov = (sum(1 for (lo, hi), x in zip(ivs, xs) if lo <= x[2] <= hi) / len(ivs)) if ivs and len(ivs) == len(xs) else float('nan')
        summary.append(dict(knob=v, term=t, truth=tv, mean=m, mse=mse, sd=sd, zmean=zmean, zmax=zmax, cov=cov, icov=icov, n=len(ests), zs=zs,
                            first=xs[0]))
        print(f"{v:>8g} {t:<22} {tv:>12.6g} {m:>12.6g} {mse:>10.3g} {sd:>10.3g} {zmean:>8.2f} {zmax:>7.2f} {cov:>7.2f} {icov:>7.2f}")
    pooled(summary, name)
    return summary

def pooled(summary, label, skip=("noise", "kohavi_wolpert.noise")):
    """Pooled z-scores over knob values and seeds for the terms with a standard error."""
    out = {}
    for r in summary:
        if r["term"] in skip or not r["zs"]: continue
        out.setdefault(r["term"], []).extend(r["zs"])
    print(f"-- pooled z over knobs x seeds: {label}")
    print(f"   {'term':<26} {'N':>5} {'mean z':>7} {'sd z':>6} {'|z|<=2':>7} {'|z|>3':>6} {'min z':>7} {'max z':>7}")
    for t, zs in out.items():
        zs = [z for z in zs if math.isfinite(z)]
        m = sum(zs) / len(zs); sd = math.sqrt(sum((z - m) ** 2 for z in zs) / (len(zs) - 1))
        print(f"   {t:<26} {len(zs):>5} {m:>7.2f} {sd:>6.2f} {sum(abs(z) <= 2 for z in zs) / len(zs):>7.3f} "
              f"{sum(abs(z) > 3 for z in zs) / len(zs):>6.3f} {min(zs):>7.2f} {max(zs):>7.2f}")
