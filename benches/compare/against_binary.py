#!/usr/bin/env python3
"""Times `lossprism run` binaries against each other in interleaved rounds (each round runs every
binary once, so a change of machine load hits all alike) and prints, per binary, the median wall
time and the median CPU time (user + system of the child, read from its resource usage), with
their ratios to the first binary's.

Usage: benches/compare/against_binary.py ROUNDS SCENARIO THREADS BIN...
Example (the engine-overhead tables of docs/performance.md):
  benches/compare/against_binary.py 11 scenarios/friedman1-tree.toml 1 OLD/lossprism target/release/lossprism
"""
import os
import statistics
import subprocess
import sys
import tempfile
import time

if len(sys.argv) < 5:
    raise SystemExit(__doc__)
rounds, scen, threads = int(sys.argv[1]), os.path.abspath(sys.argv[2]), sys.argv[3]
bins = [os.path.abspath(b) for b in sys.argv[4:]]
wall = {b: [] for b in bins}
cpu = {b: [] for b in bins}
with tempfile.TemporaryDirectory() as tmp:
    out = os.path.join(tmp, "result.json")
    for _ in range(rounds):
        for b in bins:
            start = time.perf_counter()
            child = subprocess.Popen([b, "run", scen, "--quiet", "--threads", threads, "--out", out],
                                     cwd=os.path.dirname(scen))
            _, status, usage = os.wait4(child.pid, 0)
            if status != 0:
                raise SystemExit(f"{b} failed on {scen} (status {status})")
            wall[b].append(time.perf_counter() - start)
            cpu[b].append(usage.ru_utime + usage.ru_stime)
med = statistics.median
for b in bins:
    print(f"  {b}: wall {med(wall[b]):.3f} s ({med(wall[b]) / med(wall[bins[0]]):.2f})"
          f"  cpu {med(cpu[b]):.3f} s ({med(cpu[b]) / med(cpu[bins[0]]):.2f})")
