#!/usr/bin/env bash
# Runs one lossprism scenario as a Slurm array job: task I of N computes shard I/N
# (`lossprism run SCENARIO --shard I/N --out part-I.json`), and a second job, which starts only
# when every task has succeeded (`--dependency=afterok`), merges the parts into one result that
# is identical byte for byte to the unsharded run. See docs/cluster.md.
#
# Usage (on the login node):
#   scripts/slurm-array.sh submit SCENARIO N OUTDIR [extra `lossprism run` options...]
#       Submits both jobs and prints "ARRAY_JOB_ID MERGE_JOB_ID". The result is
#       OUTDIR/result.json; the parts OUTDIR/part-I.json; Slurm's logs OUTDIR/slurm-*.out.
#   scripts/slurm-array.sh task SCENARIO N OUTDIR [extra options...]   (run by each array task)
#   scripts/slurm-array.sh merge N OUTDIR                              (run by the merge job)
#
# Environment:
#   LOSSPRISM        the lossprism binary (default: `lossprism` on PATH); sbatch passes the
#                    submitting shell's environment to the jobs, so set it before `submit`.
#   LOSSPRISM_CPUS   CPUs per array task (default 1); each task runs that many worker threads.
#   SBATCH_*         sbatch's own input variables (SBATCH_PARTITION, SBATCH_TIMELIMIT,
#                    SBATCH_ACCOUNT, ...) apply to both jobs.
set -euo pipefail

LOSSPRISM="${LOSSPRISM:-lossprism}"

die() {
    echo "slurm-array.sh: $*" >&2
    exit 2
}

usage() {
    awk 'NR > 1 && /^#/ { sub(/^# ?/, ""); print; next } NR > 1 { exit }' "$0" >&2
    exit 2
}

positive() {
    [[ "$1" =~ ^[1-9][0-9]*$ ]] || die "$2 must be a whole number >= 1, got '$1'"
}

[[ $# -ge 1 ]] || usage
mode="$1"
shift

case "$mode" in
submit)
    [[ $# -ge 3 ]] || usage
    scenario="$1" n="$2" outdir="$3"
    shift 3
    positive "$n" "N (number of shards)"
    [[ -f "$scenario" ]] || die "scenario file '$scenario' not found"
    command -v sbatch >/dev/null || die "sbatch not found: run this on a Slurm login node"
    mkdir -p "$outdir"
    scenario="$(realpath "$scenario")"
    outdir="$(realpath "$outdir")"
    self="$(realpath "$0")"
    cpus="${LOSSPRISM_CPUS:-1}"
    positive "$cpus" "LOSSPRISM_CPUS"
    # Check the scenario once here, so a typo fails now rather than in N jobs.
    "$LOSSPRISM" validate "$scenario" >/dev/null ||
        die "'$LOSSPRISM validate $scenario' failed (fix the scenario, or set LOSSPRISM to the binary)"
    array_id="$(sbatch --parsable --job-name=lossprism-shards --array="1-$n" \
        --cpus-per-task="$cpus" --output="$outdir/slurm-%A_%a.out" \
        "$self" task "$scenario" "$n" "$outdir" "$@")"
    array_id="${array_id%%;*}"
    merge_id="$(sbatch --parsable --job-name=lossprism-merge --dependency="afterok:$array_id" \
        --kill-on-invalid-dep=yes --output="$outdir/slurm-%j-merge.out" \
        "$self" merge "$n" "$outdir")"
    merge_id="${merge_id%%;*}"
    echo "$array_id $merge_id"
    ;;
task)
    [[ $# -ge 3 ]] || usage
    scenario="$1" n="$2" outdir="$3"
    shift 3
    i="${SLURM_ARRAY_TASK_ID:?task mode runs inside a Slurm array job (SLURM_ARRAY_TASK_ID unset)}"
    threads="${SLURM_CPUS_PER_TASK:-1}"
    # Written under a temporary name and renamed, so a part file is either whole or absent.
    "$LOSSPRISM" run "$scenario" --shard "$i/$n" --threads "$threads" \
        --out "$outdir/.part-$i.json.tmp" --quiet "$@"
    mv -f "$outdir/.part-$i.json.tmp" "$outdir/part-$i.json"
    echo "shard $i/$n written to $outdir/part-$i.json"
    ;;
merge)
    [[ $# -eq 2 ]] || usage
    n="$1" outdir="$2"
    positive "$n" "N (number of shards)"
    parts=()
    for ((i = 1; i <= n; i++)); do
        [[ -f "$outdir/part-$i.json" ]] || die "part $outdir/part-$i.json is missing"
        parts+=("$outdir/part-$i.json")
    done
    "$LOSSPRISM" merge "${parts[@]}" --out "$outdir/result.json"
    echo "merged $n parts into $outdir/result.json"
    ;;
*)
    usage
    ;;
esac
