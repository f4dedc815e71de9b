#!/usr/bin/env bash
# Runs `ptacorr job-array` recipes on a real single-node SLURM (Debian's slurm-wlm + munge)
# started here, on this machine, with a private configuration, state and log folder; stops
# every daemon it started on exit. Called by cli/tests/cluster.rs (an ignored test: `./run test`
# runs it once, CI too). Any failure prints the daemons' logs and exits non-zero: a scheduler
# that cannot start is a failure, never a skip.
#
# usage: on-slurm.sh PTACORR_BINARY REPOSITORY WORK_FOLDER
#
# What it checks:
#   1. a 4-task array of a null campaign (time-domain simulated nulls) and its merge job give
#      files byte-identical to the same campaign run in one process;
#   2. the same for an injection campaign (on the scenario, fresh noise every realization);
#   3. resume on requeue: one null task is killed mid-run by `scontrol requeue`; its rerun
#      reports the checkpoints it kept, and the merged result is still byte-identical;
#   4. it prints the wall time of the array (submit to merged) against the single process.
set -euo pipefail
bin=$(readlink -f "$1")
repo=$(readlink -f "$2")
work=$(readlink -f "$3")
rm -rf "$work"
mkdir -p "$work"/{state,spool,log,munge,run}
chmod 755 "$work" "$work/munge"

pids=()
stop_daemons() {
  for p in "${pids[@]}"; do kill "$p" 2>/dev/null || true; done
  for f in "$work"/run/*.pid; do [ -f "$f" ] && kill "$(cat "$f")" 2>/dev/null || true; done
  sleep 1
  for f in "$work"/run/*.pid; do [ -f "$f" ] && kill -9 "$(cat "$f")" 2>/dev/null || true; done
}
trap stop_daemons EXIT

fail() {
  echo "FAILED: $*" >&2
  for f in "$work"/log/* "$work"/recipe-*/logs/*; do
    [ -f "$f" ] || continue
    echo "----- $f (last 60 lines)" >&2
    tail -n 60 "$f" >&2
  done
  exit 1
}

for exe in munged slurmctld slurmd sbatch squeue scontrol sinfo; do
  command -v "$exe" >/dev/null || PATH="$PATH:/usr/sbin" command -v "$exe" >/dev/null ||
    fail "$exe not found: install Debian's slurm-wlm and munge (apt-get install slurm-wlm munge; .ci/run and ./run test do)"
done
export PATH="$PATH:/usr/sbin"

# munge with a fresh key and a private socket.
dd if=/dev/urandom of="$work/munge/munge.key" bs=1024 count=1 status=none
chmod 600 "$work/munge/munge.key"
munged --force --socket="$work/munge/socket" --key-file="$work/munge/munge.key" \
  --log-file="$work/log/munged.log" --pid-file="$work/run/munged.pid" \
  --seed-file="$work/munge/seed" || fail "munged did not start"

host=$(hostname -s)
port=$((20000 + ($$ % 5000) * 2))
cpus=$(nproc)
cat > "$work/slurm.conf" <<CONF
ClusterName=ptacorrtest
SlurmctldHost=$host
SlurmUser=root
SlurmdUser=root
SlurmctldPort=$port
SlurmdPort=$((port + 1))
AuthType=auth/munge
AuthInfo=socket=$work/munge/socket
CredType=cred/munge
StateSaveLocation=$work/state
SlurmdSpoolDir=$work/spool
SlurmctldPidFile=$work/run/slurmctld.pid
SlurmdPidFile=$work/run/slurmd.pid
SlurmctldLogFile=$work/log/slurmctld.log
SlurmdLogFile=$work/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SwitchType=switch/none
MpiDefault=none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
KillWait=10
JobCompType=jobcomp/none
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
NodeName=$host CPUs=$cpus State=UNKNOWN
PartitionName=main Nodes=$host Default=YES MaxTime=INFINITE State=UP
CONF
export SLURM_CONF="$work/slurm.conf"
slurmctld -f "$SLURM_CONF" || fail "slurmctld did not start"
slurmd -f "$SLURM_CONF" || fail "slurmd did not start"
ready=
for _ in $(seq 1 60); do
  if [ "$(sinfo -h -o %T 2>/dev/null | head -n1)" = idle ]; then ready=1; break; fi
  sleep 0.5
done
[ -n "$ready" ] || fail "the node did not become idle within 30 s: $(sinfo 2>&1 || true)"
echo "SLURM $(sinfo -V) up: node $host, $cpus CPUs, port $port"

# Wait for a job (all its array tasks) to leave the queue; fail after $2 seconds.
wait_job() {
  local job=$1 limit=$2 t=0
  while squeue -h -j "$job" 2>/dev/null | grep -q .; do
    sleep 1; t=$((t + 1))
    [ "$t" -lt "$limit" ] || fail "job $job still queued after ${limit} s: $(squeue 2>&1)"
  done
}
# Files of two folders, byte for byte; manifest.json too, except the line naming the command
# that wrote the folder (`merge` for a merged folder, the campaign's command for one process).
same_files() {
  diff -r -q -x .lock -x manifest.json "$1" "$2" >/dev/null ||
    { diff -r -x .lock -x manifest.json "$1" "$2" | head -n 40 >&2; fail "$1 and $2 differ"; }
  diff <(grep -v '^  "command": ' "$1/manifest.json") <(grep -v '^  "command": ' "$2/manifest.json") >&2 ||
    fail "the manifests of $1 and $2 list different files or hashes"
}
now() { date +%s.%N; }

cd "$work"
"$bin" simulate "$repo/simulations/demo.toml" --out release --seed 11 >/dev/null

# --- 1 and 3: null campaign, with one task killed mid-run and requeued --------------------------
null_args=(release --method simulate --time-domain --trials 256 --seed 7)
t0=$(now)
"$bin" null "${null_args[@]}" --out null-single >/dev/null
t1=$(now)
"$bin" job-array null --tasks 4 --recipe recipe-null --out null-array --job-name nulls -- "${null_args[@]}"
t2=$(now)
ids=$(bash recipe-null/submit.sh | tail -n1)
array=$(sed 's/.*array=\([0-9]*\).*/\1/' <<<"$ids")
merge=$(sed 's/.*merge=\([0-9]*\).*/\1/' <<<"$ids")
# Kill task 2 once it has checkpointed some chunks, and requeue it.
killed=
for _ in $(seq 1 600); do
  n=$({ find recipe-null/shards/shard-2/.partial -name 'chunk-*.csv' 2>/dev/null || true; } | wc -l)
  if [ "$n" -ge 2 ]; then
    scontrol requeue "${array}_2" || fail "scontrol requeue ${array}_2 failed"
    killed=$n
    break
  fi
  [ -f recipe-null/shards/shard-2/manifest.json ] && break
  sleep 0.2
done
[ -n "$killed" ] || fail "task 2 of the null array finished before it could be killed (make the campaign longer)"
echo "requeued task ${array}_2 after it had checkpointed $killed chunks"
wait_job "$array" 900
wait_job "$merge" 300
t3=$(now)
[ -f null-array/manifest.json ] || fail "the merge job wrote no null-array/manifest.json"
grep -q "restart 1" recipe-null/logs/shard-2.log || fail "task 2 was not restarted (no 'restart 1' in its log)"
resumed=$(grep -o 'resuming shard 2/4: [0-9]* finished chunks kept' recipe-null/logs/shard-2.log | grep -o '[0-9]* finished' | grep -o '[0-9]*' || true)
[ -n "$resumed" ] && [ "$resumed" -ge 1 ] || fail "task 2 did not resume from its checkpoints: $(cat recipe-null/logs/shard-2.log)"
same_files null-single null-array
echo "null: 4-task array with one task requeued mid-run (resumed with $resumed chunks) == single process, byte for byte"
awk -v a="$t0" -v b="$t1" -v c="$t2" -v d="$t3" 'BEGIN { printf "null campaign: single process %.1f s, 4-task array %.1f s (submit to merged, one task requeued)\n", b - a, d - c }'

# --- 2: injection campaign ------------------------------------------------------------------------
inj_args=("$repo/simulations/demo.toml" --amplitudes 0,log:3e-15:3e-14:3 --realizations 40 --mode time-domain --null-trials 200 --seed 3)
t0=$(now)
"$bin" inject "${inj_args[@]}" --out inject-single >/dev/null
t1=$(now)
"$bin" job-array inject --tasks 4 --recipe recipe-inject --out inject-array --job-name injections -- "${inj_args[@]}"
t2=$(now)
ids=$(bash recipe-inject/submit.sh | tail -n1)
array=$(sed 's/.*array=\([0-9]*\).*/\1/' <<<"$ids")
merge=$(sed 's/.*merge=\([0-9]*\).*/\1/' <<<"$ids")
wait_job "$array" 900
wait_job "$merge" 300
t3=$(now)
[ -f inject-array/manifest.json ] || fail "the merge job wrote no inject-array/manifest.json"
same_files inject-single inject-array
echo "inject: 4-task array == single process, byte for byte"
awk -v a="$t0" -v b="$t1" -v c="$t2" -v d="$t3" 'BEGIN { printf "inject campaign: single process %.1f s, 4-task array %.1f s (submit to merged)\n", b - a, d - c }'
echo "all SLURM checks passed"
