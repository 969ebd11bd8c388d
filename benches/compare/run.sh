#!/usr/bin/env bash
# Side-by-side timing: `lossprism run` against the practitioner's loop
# (benches/compare/practitioner_loop.py: numpy + scikit-learn, one fit per replicate and grid
# value) on the same workloads, same machine, same session: Friedman #1, n = 500, 10 inputs,
# 1000 evaluation points, R = 200; tree depths 1..12 and k-NN k in 1,2,3,5,8,12,20,30,50.
# Ensembles, R = 100 (benches/compare/friedman1-forest.toml, friedman1-boost.toml): a forest of
# up to 100 trees and 200 boosting rounds of depth-3 trees, each fitted once per replicate on both
# sides and read along the grid; timed in interleaved rounds (benches/compare/interleaved.py).
#
# Usage: benches/compare/run.sh [RUNS]   (default 3 timed runs per command, after one warm-up)
#        WORKLOADS="forest boost" benches/compare/run.sh 3   (a subset; default: all four)
# Needs: python3 with numpy and scikit-learn (`pip install numpy scikit-learn`); uses hyperfine
# when installed (`apt-get install hyperfine`), plain timing otherwise. LOSSPRISM names the
# binary (default: target/release/lossprism, built if missing). Results land in
# target/compare/ (hyperfine JSON and both decompositions); the summary is printed.
set -euo pipefail
cd "$(dirname "$0")/../.."
runs="${1:-3}"
out="target/compare"
mkdir -p "$out"

if [[ -z "${LOSSPRISM:-}" ]]; then
    cargo build --release --quiet --bin lossprism
    LOSSPRISM="target/release/lossprism"
fi
python3 -c "import numpy, sklearn" 2>/dev/null ||
    { echo "run.sh: python3 needs numpy and scikit-learn: pip install numpy scikit-learn" >&2; exit 2; }

echo "== machine"
echo "date:    $(date -u +%Y-%m-%dT%H:%MZ)"
echo "cpu:     $(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2- | sed 's/^ //') × $(nproc)"
echo "load:    $(cut -d' ' -f1-3 /proc/loadavg) (1, 5, 15 min)"
echo "python:  $(python3 -c 'import sys, numpy, sklearn; print(sys.version.split()[0], "numpy", numpy.__version__, "scikit-learn", sklearn.__version__)')"
echo "binary:  $LOSSPRISM ($("$LOSSPRISM" --version))"

median_of() { sort -n | awk '{a[NR]=$1} END {print (NR%2 ? a[(NR+1)/2] : (a[NR/2]+a[NR/2+1])/2)}'; }

workloads="${WORKLOADS:-tree knn forest boost}"
for w in $workloads; do
    if [[ "$w" == forest || "$w" == boost ]]; then
        echo
        echo "== friedman1-$w, R = 100, $runs interleaved rounds"
        python3 benches/compare/interleaved.py "$w" "benches/compare/friedman1-$w.toml" \
            "$LOSSPRISM" "$runs" "$out"
        python3 - "$out/lossprism-$w.json" "$out/python-$w.json" <<'PY'
import json, sys
a = json.load(open(sys.argv[1]))["points"]
b = {p["value"]: p for p in json.load(open(sys.argv[2]))["points"]}
print("  value   expected loss: lossprism ± se   python loop")
for p in a:
    q = b[int(p["value"])]
    print(f"  {p['value']:>5g}   {p['expected_loss']:9.3f} ± {p['stderr']['expected_loss']:.3f}   {q['expected_loss']:9.3f}")
PY
        continue
    fi
    scen="scenarios/friedman1-$w.toml"
    ours="$LOSSPRISM run $scen --quiet --out $out/lossprism-$w.json"
    ours1="$LOSSPRISM run $scen --quiet --threads 1 --out $out/lossprism-$w-1t.json"
    theirs="python3 benches/compare/practitioner_loop.py $w --json $out/python-$w.json"
    echo
    echo "== friedman1-$w, R = 200"
    if command -v hyperfine >/dev/null; then
        hyperfine --warmup 1 --runs "$runs" --style basic --export-json "$out/hyperfine-$w.json" \
            -n "lossprism (2 threads)" "$ours" -n "lossprism (1 thread)" "$ours1" \
            -n "python loop" "$theirs" | grep -Ev '^\s*$'
        python3 - "$out/hyperfine-$w.json" <<'PY'
import json, sys
r = {x["command"]: x for x in json.load(open(sys.argv[1]))["results"]}
py = r["python loop"]["median"]
for name in ("lossprism (2 threads)", "lossprism (1 thread)"):
    t = r[name]["median"]
    print(f"median {name}: {t:.3f} s; python loop: {py:.2f} s; ratio {py / t:.0f}x")
PY
    else
        declare -A med
        for name in ours ours1 theirs; do
            cmd="${!name}"
            $cmd >/dev/null
            med[$name]="$(for ((i = 0; i < runs; i++)); do
                s=$(date +%s.%N); $cmd >/dev/null; e=$(date +%s.%N)
                echo "$e - $s" | bc -l
            done | median_of)"
        done
        echo "median lossprism (2 threads): ${med[ours]} s; (1 thread): ${med[ours1]} s; python loop: ${med[theirs]} s"
        echo "ratio: $(echo "${med[theirs]} / ${med[ours]}" | bc -l | cut -c1-6)x (2 threads), $(echo "${med[theirs]} / ${med[ours1]}" | bc -l | cut -c1-6)x (1 thread)"
    fi
    # Same work: the two decompositions agree up to Monte Carlo error (different random numbers
    # and evaluation points), shown side by side.
    python3 - "$out/lossprism-$w.json" "$out/python-$w.json" <<'PY'
import json, sys
a = json.load(open(sys.argv[1]))["points"]
b = {p["value"]: p for p in json.load(open(sys.argv[2]))["points"]}
print("  value   expected loss: lossprism ± se   python loop")
for p in a:
    q = b[int(p["value"])]
    print(f"  {p['value']:>5g}   {p['expected_loss']:9.3f} ± {p['stderr']['expected_loss']:.3f}   {q['expected_loss']:9.3f}")
PY
done
