#!/usr/bin/env python3
"""Interleaved whole-process timing of lossprism against the plain Python loop, for a machine
shared with other work: every round runs each command once, in the same order, so that a change
of load hits all of them alike; the medians over the rounds and their ratios are printed, and
every single time is kept in a JSON file.

Usage: interleaved.py WORKLOAD SCENARIO LOSSPRISM ROUNDS OUT_DIR
  WORKLOAD  forest | boost | tree | knn (the practitioner_loop.py workload)
  SCENARIO  the lossprism scenario file doing the same work
Writes OUT_DIR/interleaved-WORKLOAD.json and the two decompositions of the last round.
"""
import json
import os
import statistics
import subprocess
import sys
import time


def main():
    workload, scenario, binary, rounds, out = sys.argv[1:6]
    rounds = int(rounds)
    here = os.path.dirname(os.path.abspath(__file__))
    commands = {
        "lossprism (2 threads)": [binary, "run", scenario, "--quiet", "--threads", "2",
                                  "--out", f"{out}/lossprism-{workload}.json"],
        "lossprism (1 thread)": [binary, "run", scenario, "--quiet", "--threads", "1",
                                 "--out", f"{out}/lossprism-{workload}-1t.json"],
        "python loop": [sys.executable, os.path.join(here, "practitioner_loop.py"), workload,
                        "--json", f"{out}/python-{workload}.json"],
    }
    times = {name: [] for name in commands}
    loads = []
    for r in range(rounds):
        for name, cmd in commands.items():
            loads.append(os.getloadavg()[0])
            start = time.perf_counter()
            subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
            times[name].append(time.perf_counter() - start)
            print(f"round {r + 1}/{rounds}  {name:22} {times[name][-1]:8.3f} s", flush=True)
    med = {name: statistics.median(t) for name, t in times.items()}
    py = med["python loop"]
    for name in ("lossprism (2 threads)", "lossprism (1 thread)"):
        print(f"median {name}: {med[name]:.3f} s; python loop: {py:.2f} s; "
              f"ratio {py / med[name]:.1f}x  (all: {', '.join(f'{t:.2f}' for t in times[name])})")
    print(f"python loop, all: {', '.join(f'{t:.2f}' for t in times['python loop'])}")
    print(f"load average (1 min) at the starts: {min(loads):.1f} to {max(loads):.1f}")
    with open(f"{out}/interleaved-{workload}.json", "w") as fh:
        json.dump({"workload": workload, "times": times, "medians": med,
                   "load_at_starts": loads}, fh, indent=1)


if __name__ == "__main__":
    main()
