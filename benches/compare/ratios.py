#!/usr/bin/env python3
"""Prints criterion's median times and ratios after `cargo bench --bench path_fits` and
`cargo bench --bench whole_runs`:
  path_fits:  whole grid / most complex only, per family (target: at most 1.3);
  whole_runs: 1 thread / 2 threads, per scenario (target: at least 1.8).
Reads target/criterion/*/*/new/{benchmark,estimates}.json (CARGO_TARGET_DIR is honoured).
"""
import glob
import json
import os

root = os.path.join(os.environ.get("CARGO_TARGET_DIR", "target"), "criterion")
groups = {}
for bench in glob.glob(os.path.join(root, "*", "*", "new", "benchmark.json")):
    meta = json.load(open(bench))
    est = json.load(open(os.path.join(os.path.dirname(bench), "estimates.json")))
    groups.setdefault(meta["group_id"], {})[meta["function_id"]] = est["median"]["point_estimate"]


def fmt(ns):
    return f"{ns / 1e6:9.3f} ms" if ns < 1e9 else f"{ns / 1e9:9.3f} s "


if not groups:
    raise SystemExit(f"no criterion results under {root}: run cargo bench first")
for g in sorted(groups):
    f = groups[g]
    if "whole grid" in f and "most complex only" in f:
        r = f["whole grid"] / f["most complex only"]
        print(f"{g:34} whole grid {fmt(f['whole grid'])}  most complex {fmt(f['most complex only'])}"
              f"  ratio {r:5.2f}  (target <= 1.3)")
    elif "1 thread(s)" in f and "2 thread(s)" in f:
        s = f["1 thread(s)"] / f["2 thread(s)"]
        print(f"{g:34} 1 thread {fmt(f['1 thread(s)'])}  2 threads {fmt(f['2 thread(s)'])}"
              f"  speed-up {s:4.2f}  (target >= 1.8)")
    else:
        for name, ns in sorted(f.items()):
            print(f"{g:34} {name}: {fmt(ns)}")
