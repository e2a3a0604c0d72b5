#!/usr/bin/env bash
# End-to-end test of the Slurm recipe (tests/slurm/*.sbatch) on a real single-node Slurm
# cluster started here on loopback: munge, slurmctld and slurmd from Debian's slurm-wlm
# and munge packages, run as root, with state and spool folders in a temporary folder.
# It fits a model on 3 synthetic fields, labels 8 fields with a 4-task array job, merges
# in a dependent job, and checks the summary equals a single-machine run. Everything it
# starts is stopped on exit. If the cluster cannot start, it fails with the logs.
#
# Usage: tests/slurm/run.sh PATH/TO/modalmap
set -euo pipefail
BIN=$(readlink -f "$1")
HERE=$(cd "$(dirname "$0")" && pwd)
fail() { echo "slurm test: $*" >&2; exit 1; }
for c in munged slurmctld slurmd sbatch sinfo; do
    command -v "$c" >/dev/null || fail "$c not found: install Debian's slurm-wlm and munge (tests/slurm.rs does as root)"
done
[ "$(id -u)" = 0 ] || fail "needs root to start munged and slurmd"

WORK=$(mktemp -d /tmp/modalmap-slurm.XXXXXX)
S=$WORK/slurm
mkdir -p "$S/state" "$S/spool" "$S/log" "$WORK/munge"
PIDS=()
cleanup() {
    for p in "$S/slurmd.pid" "$S/slurmctld.pid"; do
        [ -f "$p" ] && kill "$(cat "$p")" 2>/dev/null || true
    done
    [ -f "$WORK/munge/munged.pid" ] && kill "$(cat "$WORK/munge/munged.pid")" 2>/dev/null || true
    for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done
    sleep 1
    rm -rf "$WORK"
}
trap cleanup EXIT
logs() { tail -n 30 "$S"/log/*.log "$WORK"/munge/*.log 2>/dev/null >&2 || true; }

# munge: a fresh key and a private socket.
dd if=/dev/urandom of="$WORK/munge/munge.key" bs=1024 count=1 status=none
chmod 400 "$WORK/munge/munge.key"
munged --force --key-file="$WORK/munge/munge.key" --socket="$WORK/munge/socket" \
    --pid-file="$WORK/munge/munged.pid" --log-file="$WORK/munge/munged.log" \
    --seed-file="$WORK/munge/seed" || { logs; fail "munged did not start"; }

HOST=$(hostname -s)
CPUS=$(nproc)
MEM=$(( $(awk '/MemTotal/ {print $2}' /proc/meminfo) / 2048 ))
export SLURM_CONF=$S/slurm.conf
cat > "$SLURM_CONF" <<CONF
ClusterName=modalmap-test
SlurmctldHost=$HOST(127.0.0.1)
SlurmctldPort=16817
SlurmdPort=16818
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$WORK/munge/socket
StateSaveLocation=$S/state
SlurmdSpoolDir=$S/spool
SlurmctldPidFile=$S/slurmctld.pid
SlurmdPidFile=$S/slurmd.pid
SlurmctldLogFile=$S/log/slurmctld.log
SlurmdLogFile=$S/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerType=sched/backfill
ReturnToService=2
MpiDefault=none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
NodeName=$HOST NodeAddr=127.0.0.1 CPUs=$CPUS RealMemory=$MEM State=UNKNOWN
PartitionName=test Nodes=$HOST Default=YES MaxTime=INFINITE State=UP
CONF
slurmctld -f "$SLURM_CONF" || { logs; fail "slurmctld did not start"; }
slurmd -f "$SLURM_CONF" -N "$HOST" || { logs; fail "slurmd did not start"; }
for _ in $(seq 60); do
    state=$(sinfo -h -N -o %t 2>/dev/null | head -n1 || true)
    [ "$state" = idle ] && break
    sleep 1
done
[ "${state:-}" = idle ] || { logs; fail "the node did not come up (state '${state:-none}')"; }
echo "slurm test: single-node cluster up ($HOST, $CPUS CPUs)"

# Fields: 3 to fit on, 8 to label (invented rocks, seeded).
cd "$WORK"
for s in 1 2 3 4 5 6 7 8 9 10 11; do
    "$BIN" synth --scenario benchmark-rock --size 128 --seed "$s" -o "rock$s" >/dev/null
done
"$BIN" fit rock1 rock2 rock3 -o model.json --quiet
printf '%s\n' rock4 rock5 rock6 rock7 rock8 rock9 rock10 rock11 > fields.txt

# Through the scheduler: the array job, then the merge job after it.
export MODALMAP=$BIN MODEL=model.json FIELDS=fields.txt OUT=out SUMMARY=summary SHARDS=4
array=$(sbatch --parsable --array=1-4 "$HERE/apply-array.sbatch") || { logs; fail "sbatch refused the array job"; }
merge=$(sbatch --parsable --dependency=afterok:"$array" "$HERE/merge.sbatch") || { logs; fail "sbatch refused the merge job"; }
for _ in $(seq 300); do
    [ -z "$(squeue -h -j "$array,$merge" 2>/dev/null)" ] && break
    sleep 1
done
[ -f summary/summary.json ] || { cat modalmap-*.log >&2 || true; logs; fail "no summary from the Slurm run"; }
for i in 1 2 3 4; do
    [ -f "out/apply-$i-of-4.json" ] || fail "task $i left no apply-$i-of-4.json"
done

# One task again, alone (as after a failure): shard 2/4 holds rock5 and rock9; rock5's
# output is gone, rock9's is kept.
rm -r out/rock5
again=$(sbatch --parsable --array=2 "$HERE/apply-array.sbatch") || { logs; fail "sbatch refused the rerun"; }
for _ in $(seq 300); do
    [ -z "$(squeue -h -j "$again" 2>/dev/null)" ] && break
    sleep 1
done
[ -f out/rock5/report.json ] || { cat modalmap-*.log >&2 || true; fail "the rerun of task 2 did not label rock5"; }
[ -e out/apply.json ] && fail "the rerun of task 2 took itself for the only shard"
python3 - <<'PY' || fail "the rerun of task 2 did not label rock5 alone and keep rock9"
import json, sys
a = json.load(open("out/apply-2-of-4.json"))
done = [f["field"] for f in a["fields"]]
kept = [f["field"] for f in a["kept"]]
sys.exit(0 if a["shard"] == [2, 4] and done == ["rock5"] and kept == ["rock9"] else f"{a['shard']} {done} {kept}")
PY
echo "slurm test: task 2 rerun alone relabelled rock5 and kept rock9"

# The same on one machine.
mapfile -t fields < fields.txt
"$BIN" apply model.json "${fields[@]}" -o single --quiet
"$BIN" merge single -o single-summary --quiet
python3 - <<'PY'
import json, sys
a = json.load(open("summary/summary.json"))
b = json.load(open("single-summary/summary.json"))
if len(a["fields"]) != 8:
    sys.exit(f"slurm test: {len(a['fields'])} fields merged, not 8")
if a["phases"] != b["phases"]:
    sys.exit("slurm test: the Slurm summary differs from the single-machine one")
print(f"slurm test: 8 fields in 4 array tasks; merged summary equals the single-machine run ({len(a['phases'])} phases)")
PY
