#!/usr/bin/env bash
# Scale measurements of whole runs (docs/performance.md): wall time against R (linear?), peak
# memory at R = 200 and R = 2000 (accumulators must not grow with R), and 1 against 2 worker
# threads at R = 200. Medians of RUNS runs (default 5). LOSSPRISM names the binary (default:
# target/release/lossprism, built if missing). Needs GNU time (/usr/bin/time).
#
# Usage: benches/scale.sh [SCENARIO] [RUNS]   (default scenarios/friedman1-tree.toml, 5)
set -euo pipefail
cd "$(dirname "$0")/.."
scen="${1:-scenarios/friedman1-tree.toml}"
runs="${2:-5}"
if [[ -z "${LOSSPRISM:-}" ]]; then
    cargo build --release --quiet --bin lossprism
    LOSSPRISM="target/release/lossprism"
fi
[[ -x /usr/bin/time ]] || { echo "scale.sh: needs GNU time (apt-get install time)" >&2; exit 2; }
tmp="$(mktemp -d)"
trap 'rm -rf "$tmp"' EXIT

# Prints "median_wall_seconds median_peak_kib" of RUNS runs of `lossprism run SCEN ARGS...`
# (the middle value of each; with an even RUNS the lower middle).
measure() {
    : >"$tmp/all"
    for ((i = 0; i < runs; i++)); do
        /usr/bin/time -f "%e %M" -o "$tmp/t" "$LOSSPRISM" run "$scen" --quiet --out "$tmp/r.json" "$@"
        cat "$tmp/t" >>"$tmp/all"
    done
    local mid=$(((runs + 1) / 2))
    echo "$(cut -d' ' -f1 "$tmp/all" | sort -n | sed -n "${mid}p") $(cut -d' ' -f2 "$tmp/all" | sort -n | sed -n "${mid}p")"
}

echo "scenario $scen; $runs runs each; load $(cut -d' ' -f1-3 /proc/loadavg); $(nproc) cores"
echo
echo "wall time against R (default threads):"
for r in 100 200 400 800 1600; do
    read -r t m < <(measure --replicates "$r")
    printf "  R = %5d  %7.3f s  %8.2f ms per replicate  peak %7d KiB\n" "$r" "$t" \
        "$(echo "1000 * $t / $r" | bc -l)" "$m"
done
echo
echo "peak memory (max resident set):"
read -r _ m200 < <(measure --replicates 200)
read -r _ m2000 < <(measure --replicates 2000)
printf "  R = 200: %d KiB   R = 2000: %d KiB   ratio %.3f (target: within 10%%)\n" "$m200" "$m2000" \
    "$(echo "$m2000 / $m200" | bc -l)"
echo
echo "threads at R = 200:"
read -r t1 _ < <(measure --replicates 200 --threads 1)
read -r t2 _ < <(measure --replicates 200 --threads 2)
printf "  1 thread %.3f s   2 threads %.3f s   speed-up %.2f (target >= 1.8)\n" "$t1" "$t2" \
    "$(echo "$t1 / $t2" | bc -l)"
