#!/usr/bin/env bash
# Tests the cluster recipe for real: a single-node Slurm (controller `slurmctld` and compute
# daemon `slurmd` on localhost, authenticated by `munged`) runs scripts/slurm-array.sh on a
# shipped scenario; the merged result must equal the unsharded run byte for byte.
#
# Needs root (it installs Debian's slurm-wlm and munge when missing, and starts the daemons).
# Everything it creates lives in one temporary folder (configuration, state, spool, logs, munge
# socket); it stops the daemons it started by their pids and removes the folder. Bounded: gives
# up after LOSSPRISM_SLURM_TIMEOUT seconds (default 180) with a clear message.
#
# Usage: scripts/test-slurm.sh            (from the repository; builds target/release/lossprism
#                                          if LOSSPRISM does not name a binary)
# Environment: LOSSPRISM (binary), LOSSPRISM_SLURM_KEEP=1 keeps the temporary folder.
# Exit: 0 identical, 1 mismatch or a job failed, 2 cannot set up (not root, no packages...).
set -euo pipefail
cd "$(dirname "$0")/.."
repo="$(pwd)"

timeout_s="${LOSSPRISM_SLURM_TIMEOUT:-180}"
start_s=$SECONDS
shards=4
scenario="$repo/scenarios/friedman1-tree.toml"

say() { echo "test-slurm: $*"; }
fail() {
    echo "test-slurm: FAIL: $*" >&2
    exit 1
}
setup_fail() {
    echo "test-slurm: cannot run: $*" >&2
    exit 2
}
left() { echo $((timeout_s - (SECONDS - start_s))); }
check_time() {
    if (($(left) <= 0)); then
        fail "gave up after ${timeout_s} s while $1 (set LOSSPRISM_SLURM_TIMEOUT to wait longer)"
    fi
}

[[ "$(id -u)" -eq 0 ]] || setup_fail "must run as root (installs packages, starts daemons)"

# 1. Packages.
if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null ||
    ! command -v sbatch >/dev/null || ! [[ -x /usr/sbin/munged ]]; then
    say "installing slurm-wlm and munge (Debian packages)"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq >/dev/null || setup_fail "apt-get update failed"
    apt-get install -y -qq slurm-wlm munge >/dev/null || setup_fail "apt-get install slurm-wlm munge failed"
fi
id munge >/dev/null 2>&1 || setup_fail "the munge user does not exist (munge package incomplete)"
if [[ ! -s /etc/munge/munge.key ]]; then
    say "creating /etc/munge/munge.key"
    install -d -o munge -g munge -m 0700 /etc/munge
    if command -v mungekey >/dev/null; then
        runuser -u munge -- mungekey --create --keyfile=/etc/munge/munge.key >/dev/null
    else
        dd if=/dev/urandom of=/etc/munge/munge.key bs=1 count=1024 status=none
        chown munge:munge /etc/munge/munge.key
        chmod 0400 /etc/munge/munge.key
    fi
fi

# 2. The binary.
if [[ -n "${LOSSPRISM:-}" ]]; then
    bin="$(realpath "$LOSSPRISM")"
else
    say "building target/release/lossprism"
    cargo build --release --quiet --bin lossprism || setup_fail "cargo build failed"
    bin="$repo/target/release/lossprism"
fi
[[ -x "$bin" ]] || setup_fail "no lossprism binary at $bin"
export LOSSPRISM="$bin"

# 3. A private folder for everything, and cleanup on every exit path.
tmp="$(mktemp -d /tmp/lossprism-slurm.XXXXXX)"
chmod 0755 "$tmp" # munged (user munge) must reach its socket folder inside
mkdir -p "$tmp/state" "$tmp/spool" "$tmp/out"
install -d -o munge -g munge -m 0755 "$tmp/munge"
pids_to_stop=()
cleanup() {
    local rc=$?
    set +e
    if [[ -n "${SLURM_CONF:-}" ]] && [[ -n "${job_ids:-}" ]]; then
        scancel $job_ids >/dev/null 2>&1
    fi
    for pidfile in "$tmp/slurmd.pid" "$tmp/slurmctld.pid" "$tmp/munge/munged.pid"; do
        if [[ -s "$pidfile" ]]; then
            pid="$(cat "$pidfile")"
            kill "$pid" 2>/dev/null
            for _ in $(seq 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
            kill -9 "$pid" 2>/dev/null
        fi
    done
    if [[ $rc -ne 0 ]]; then
        for log in "$tmp/slurmctld.log" "$tmp/slurmd.log" "$tmp/munge/munged.log" "$tmp"/out/slurm-*.out; do
            [[ -f "$log" ]] || continue
            echo "---- last lines of $log" >&2
            tail -n 15 "$log" >&2
        done
    fi
    if [[ "${LOSSPRISM_SLURM_KEEP:-0}" == 1 ]]; then
        echo "test-slurm: kept $tmp" >&2
    else
        rm -rf "$tmp"
    fi
    exit $rc
}
trap cleanup EXIT
trap 'exit 130' INT TERM

# 4. munged on a private socket.
runuser -u munge -- /usr/sbin/munged \
    --socket="$tmp/munge/munge.socket" \
    --pid-file="$tmp/munge/munged.pid" \
    --log-file="$tmp/munge/munged.log" \
    --seed-file="$tmp/munge/munged.seed" ||
    setup_fail "munged did not start"

# 5. slurm.conf: every path in the folder; localhost only; the node as `slurmd -C` sees it.
node="$(hostname -s)"
hw="$(slurmd -C 2>/dev/null | head -n 1)"
field() { sed -n "s/.*[[:space:]]$1=\([0-9]*\).*/\1/p" <<<"$hw"; }
sockets="$(field SocketsPerBoard)"
cores="$(field CoresPerSocket)"
threads="$(field ThreadsPerCore)"
[[ -n "$sockets" && -n "$cores" && -n "$threads" ]] || { sockets=1 cores="$(nproc)" threads=1; }
cat >"$tmp/slurm.conf" <<EOF
ClusterName=lossprism-test
SlurmctldHost=$node(127.0.0.1)
SlurmctldPort=16817
SlurmdPort=16818
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
AuthInfo=socket=$tmp/munge/munge.socket
CredType=cred/munge
StateSaveLocation=$tmp/state
SlurmdSpoolDir=$tmp/spool
SlurmctldPidFile=$tmp/slurmctld.pid
SlurmdPidFile=$tmp/slurmd.pid
SlurmctldLogFile=$tmp/slurmctld.log
SlurmdLogFile=$tmp/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MailProg=/bin/true
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
SchedulerType=sched/builtin
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerParameters=batch_sched_delay=0,sched_min_interval=0
ReturnToService=2
SlurmctldTimeout=30
SlurmdTimeout=30
MinJobAge=600
NodeName=$node NodeAddr=127.0.0.1 Sockets=$sockets CoresPerSocket=$cores ThreadsPerCore=$threads State=UNKNOWN
PartitionName=test Nodes=$node Default=YES MaxTime=INFINITE State=UP
EOF
export SLURM_CONF="$tmp/slurm.conf"

# 6. The daemons (they daemonize and write their pid files).
slurmctld -i || setup_fail "slurmctld did not start"
slurmd -N "$node" || setup_fail "slurmd did not start"
say "daemons started; waiting for the node"
until sinfo -h -n "$node" -o %T 2>/dev/null | grep -qE '^(idle|mixed|allocated)'; do
    check_time "waiting for node $node to come up ($(sinfo -h -o %T 2>/dev/null || echo 'no answer'))"
    sleep 0.5
done

# 7. Submit the array job and the merge job through the recipe.
say "submitting $shards shards of $(basename "$scenario")"
read -r array_id merge_id < <(scripts/slurm-array.sh submit "$scenario" "$shards" "$tmp/out")
job_ids="$array_id $merge_id"
say "array job $array_id, merge job $merge_id"
while [[ -n "$(squeue -h -j "$array_id,$merge_id" -o %i 2>/dev/null)" ]]; do
    check_time "waiting for jobs $array_id and $merge_id ($(squeue -h -j "$array_id,$merge_id" -o '%i:%T' 2>/dev/null | tr '\n' ' '))"
    sleep 0.5
done
say "jobs finished after $((SECONDS - start_s)) s"

# 8. Every task and the merge must have succeeded.
for ((i = 1; i <= shards; i++)); do
    [[ -s "$tmp/out/part-$i.json" ]] || fail "shard $i/$shards produced no part file"
done
[[ -s "$tmp/out/result.json" ]] || fail "the merge job produced no result.json"

# 9. The unsharded run, byte for byte.
"$bin" run "$scenario" --out "$tmp/whole.json" --quiet
if ! cmp "$tmp/out/result.json" "$tmp/whole.json"; then
    fail "merged result of $shards Slurm shards differs from the unsharded run"
fi
say "OK: merged result of $shards Slurm array tasks is identical to the unsharded run ($((SECONDS - start_s)) s)"
