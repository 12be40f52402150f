#!/usr/bin/env bash
# The sharded sweep of docs/sweeps.md on a real Slurm: a single-node cluster on this machine
# (munged, slurmctld and slurmd started by hand, their configuration and state in a temporary
# directory, nothing in /etc), the documented job array and merge job run as written in the
# doc (only smaller), the merged outputs compared byte for byte with an unsharded run, and the
# documented recovery from a failed task exercised. Exits 0 only when everything matches.
#
# Not part of the default test run: it needs root (to install Slurm from the distribution's
# packages when missing, and to run the daemons), and takes a minute or two.
#
#   scripts/slurm-check.sh            # builds target/release/cistern when missing
#   CISTERN_BIN=path/to/cistern scripts/slurm-check.sh
#   KEEP=1 scripts/slurm-check.sh     # keep the temporary directory (logs, outputs)
set -euo pipefail

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
say() { printf 'slurm-check: %s\n' "$*"; }
fail() { printf 'slurm-check: FAILED: %s\n' "$*" >&2; exit 1; }

# ---- Slurm, munge and the binary -------------------------------------------------------------
missing=()
command -v munged >/dev/null || missing+=(munge)
command -v slurmctld >/dev/null || missing+=(slurmctld)
command -v slurmd >/dev/null || missing+=(slurmd)
command -v sbatch >/dev/null || missing+=(slurm-client)
if ((${#missing[@]} > 0)); then
    say "installing ${missing[*]}"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq "${missing[@]}" >/dev/null
fi
say "$(slurmctld -V), $(munged --version 2>&1 | awk '{print $1; exit}')"

bin="${CISTERN_BIN:-$root/target/release/cistern}"
if [[ ! -x "$bin" ]]; then
    say "building $bin"
    (cd "$root" && cargo build --release)
fi

work="$(mktemp -d /tmp/cistern-slurm.XXXXXX)"
chmod 700 "$work"
daemons=()
# Stop the daemons this script started, by their process ids, the last started first.
stop_daemons() {
    local i
    for ((i = ${#daemons[@]} - 1; i >= 0; i--)); do
        kill "${daemons[i]}" 2>/dev/null || true
        wait "${daemons[i]}" 2>/dev/null || true
        if kill -0 "${daemons[i]}" 2>/dev/null; then
            printf 'slurm-check: process %s is still running\n' "${daemons[i]}" >&2
        fi
    done
    daemons=()
}
finish() {
    stop_daemons
    if [[ -n "${KEEP:-}" ]]; then say "kept $work"; else rm -rf "$work"; fi
}
trap finish EXIT

# cistern on the compute node's PATH (docs/sweeps.md: it must be there); jobs inherit the
# submitting shell's environment.
mkdir -p "$work/bin"
cp "$bin" "$work/bin/cistern"
export PATH="$work/bin:$PATH"
say "cistern: $(cistern --version)"

# ---- A single-node cluster on localhost ------------------------------------------------------
mkdir -p "$work/munge" "$work/ctld" "$work/spool"
head -c 1024 /dev/urandom >"$work/munge/munge.key"
chmod 400 "$work/munge/munge.key"
munged --foreground --force --key-file="$work/munge/munge.key" --socket="$work/munge/munge.sock" \
    --pid-file="$work/munge/munged.pid" --log-file="$work/munge/munged.log" \
    --seed-file="$work/munge/munged.seed" >"$work/munge/munged.out" 2>&1 &
daemons+=($!)

# Two free ports on the loopback address.
free_port() {
    local port
    for port in $(shuf -i 20000-39999 -n 50); do
        if ! (exec 3<>"/dev/tcp/127.0.0.1/$port") 2>/dev/null; then
            echo "$port"
            return
        fi
    done
    fail "no free port found"
}
ctld_port="$(free_port)"
slurmd_port="$(free_port)"
[[ "$ctld_port" != "$slurmd_port" ]] || slurmd_port=$((ctld_port + 1))

host="$(hostname -s)"
node="$(slurmd -C | head -n 1)" # this machine's NodeName=... CPUs=... RealMemory=... line
conf="$work/slurm.conf"
: >"$work/plugstack.conf"
cat >"$conf" <<EOF
ClusterName=cistern-check
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=$ctld_port
SlurmdPort=$slurmd_port
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$work/munge/munge.sock
SlurmUser=root
SlurmdUser=root
StateSaveLocation=$work/ctld
SlurmdSpoolDir=$work/spool
SlurmctldPidFile=$work/slurmctld.pid
SlurmdPidFile=$work/slurmd.pid
SlurmctldLogFile=$work/slurmctld.log
SlurmdLogFile=$work/slurmd.log
PlugStackConfig=$work/plugstack.conf
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
MpiDefault=none
SwitchType=switch/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
MinJobAge=3600
$node NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=check Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
export SLURM_CONF="$conf"

# Wait for munged's socket before the Slurm daemons need it.
for _ in $(seq 50); do [[ -S "$work/munge/munge.sock" ]] && break; sleep 0.2; done
[[ -S "$work/munge/munge.sock" ]] || fail "munged did not start: $(cat "$work/munge/munged.log" 2>/dev/null)"
slurmctld -D -c -f "$conf" >"$work/slurmctld.out" 2>&1 &
daemons+=($!)
slurmd -D -f "$conf" -N "$host" >"$work/slurmd.out" 2>&1 &
daemons+=($!)
say "munged, slurmctld and slurmd started (pids ${daemons[*]}; configuration in $work)"
for _ in $(seq 60); do
    state="$(sinfo -h -o %T 2>/dev/null || true)"
    [[ "$state" == idle ]] && break
    sleep 1
done
[[ "${state:-}" == idle ]] || fail "the node did not become idle (state '${state:-}'); see $work/slurmctld.log"
say "node $host idle: $(sinfo -h -o '%c CPUs, %m MB')"

# ---- The documented scripts, smaller ---------------------------------------------------------
# The fenced block of docs/sweeps.md whose second line starts with "# NAME:".
doc_script() {
    awk -v name="# $1:" '
        /^```/ { if (on) exit; block = 1; n = 0; next }
        block { n++; if (n == 1) first = $0; else if (n == 2) { if (index($0, name) == 1) { on = 1; print first } else block = 0 } }
        on { print }
    ' "$root/docs/sweeps.md"
}
subjects=4000
shards=4
# Replace FROM by TO in TEXT, failing when the doc no longer has FROM.
replace() {
    local text="$1" from="$2" to="$3"
    [[ "$text" == *"$from"* ]] || fail "docs/sweeps.md no longer has '$from' in its job scripts"
    printf '%s\n' "${text//"$from"/"$to"}"
}
sweep_sh="$(doc_script sweep.sh)"
merge_sh="$(doc_script merge.sh)"
[[ -n "$sweep_sh" && -n "$merge_sh" ]] || fail "sweep.sh or merge.sh not found in docs/sweeps.md"
sweep_sh="$(replace "$sweep_sh" "--subjects 1000000" "--subjects $subjects")"
sweep_sh="$(replace "$sweep_sh" "--array=1-16" "--array=1-$shards")"
sweep_sh="$(replace "$sweep_sh" "N=16 " "N=$shards ")"
merge_sh="$(replace "$merge_sh" "N=16 " "N=$shards ")"

new_run() {
    local dir="$work/$1"
    mkdir -p "$dir"
    cp "$root/demo-regimens/model.toml" "$dir/model.toml"
    cp "$root/demo-regimens/covariates.csv" "$dir/pool.csv"
    printf '%s\n' "$sweep_sh" >"$dir/sweep.sh"
    printf '%s\n' "$merge_sh" >"$dir/merge.sh"
    echo "$dir"
}

# The reference: the same sweep, unsharded, from the cistern command of sweep.sh.
ref="$(new_run reference)"
command_line="$(awk '/^cistern sweep/ { on = 1 } on { print } on && !/\\$/ { exit }' "$ref/sweep.sh" |
    sed 's/\\$//' | tr '\n' ' ')"
command_line="${command_line%%--shard*}"
[[ "$command_line" == "cistern sweep "* ]] || fail "no cistern sweep command in sweep.sh"
say "unsharded: $command_line-o summary.csv --per-subject subjects.csv"
(cd "$ref" && eval "$command_line -o summary.csv --per-subject subjects.csv --quiet" 2>/dev/null)

# Wait until a job (or a whole array) has left the queue.
wait_job() {
    local id="$1"
    for _ in $(seq 600); do
        [[ -z "$(squeue -h -j "$id" 2>/dev/null)" ]] && return
        sleep 1
    done
    fail "job $id still queued after 10 minutes"
}
job_states() { scontrol -o show job "$1" | grep -o 'JobState=[A-Z_]*' | sort | uniq -c | tr -s ' ' | tr '\n' ' '; }
same() {
    local what="$1" a="$2" b="$3"
    cmp -s "$a" "$b" || fail "$what differs from the unsharded run ($a, $b)"
    say "  $what: identical to the unsharded run ($(wc -c <"$a") bytes)"
}

# ---- 1. The documented array job and merge -------------------------------------------------
run="$(new_run clean)"
cd "$run"
mkdir -p logs
array=$(sbatch --parsable sweep.sh)
merge_job=$(sbatch --parsable --dependency=afterany:"$array" merge.sh)
say "1. array $array ($shards shards of $subjects subjects) and merge $merge_job (afterany)"
wait_job "$array"
wait_job "$merge_job"
say "  array: $(job_states "$array")"
say "  merge: $(job_states "$merge_job")"
same "summary.csv" summary.csv "$ref/summary.csv"
same "subjects.csv" subjects.csv "$ref/subjects.csv"

# Staged merges of the same states: two halves, then the halves together.
cistern merge states/shard-1.json states/shard-2.json --state-out first.json --quiet 2>/dev/null
cistern merge states/shard-3.json --state-out second.json --quiet 2>/dev/null
cistern merge second.json states/shard-4.json --state-out second-all.json --quiet 2>/dev/null
cistern merge first.json second-all.json -o staged.csv --quiet 2>/dev/null
same "summary merged in stages" staged.csv "$ref/summary.csv"

# ---- 2. A failed task and the documented recovery --------------------------------------------
# The failure is injected without touching the documented scripts: for this round, a
# `cistern` earlier on PATH fails for array task 3 and runs the real one otherwise.
run="$(new_run recovery)"
cd "$run"
mkdir -p logs "$work/failing"
cat >"$work/failing/cistern" <<EOF
#!/bin/bash
if [[ "\${SLURM_ARRAY_TASK_ID:-}" == 3 && "\$1" == sweep ]]; then
    echo "cistern: injected failure of array task 3" >&2
    exit 1
fi
exec "$work/bin/cistern" "\$@"
EOF
chmod +x "$work/failing/cistern"
array=$(PATH="$work/failing:$PATH" sbatch --parsable sweep.sh)
merge_job=$(sbatch --parsable --dependency=afterany:"$array" merge.sh)
# What the old documentation said, for contrast: a merge waiting on afterok.
stuck=$(sbatch --parsable --dependency=afterok:"$array" merge.sh)
say "2. array $array with task 3 failing, merge $merge_job (afterany), merge $stuck (afterok)"
wait_job "$array"
wait_job "$merge_job"
say "  array: $(job_states "$array")"
say "  merge (afterany): $(job_states "$merge_job")"
sleep 2
reason="$(squeue -h -j "$stuck" -o '%T %r' 2>/dev/null || true)"
say "  merge (afterok): ${reason:-gone}"
[[ "$reason" == "PENDING DependencyNeverSatisfied" ]] || fail "expected the afterok merge to pend forever"
scancel "$stuck"
scontrol -o show job "$array" | grep -q 'JobState=FAILED' || fail "task 3 did not fail"
log="logs/merge-$merge_job.log"
[[ -f "$log" ]] || fail "no merge log $log"
sed 's/^/  | /' "$log"
grep -q "shards missing: 3 (of $shards)" "$log" || fail "the merge did not report shard 3 missing"
[[ ! -e summary.csv && ! -e subjects.csv ]] || fail "the failed merge wrote output"
resubmit="$(grep -o 'fix=.*' "$log")"
[[ -n "$resubmit" ]] || fail "the merge log gives no resubmission command"
say "  running the command from the merge log: $resubmit"
eval "$resubmit" >"$work/resubmitted" # sets fix, the resubmitted task's job
merge_job=$(grep -o '[0-9]*$' "$work/resubmitted")
wait_job "$fix"
wait_job "$merge_job"
say "  task 3 again: $(job_states "$fix")"
say "  merge: $(job_states "$merge_job")"
same "summary.csv after recovery" summary.csv "$ref/summary.csv"
same "subjects.csv after recovery" subjects.csv "$ref/subjects.csv"

cd "$work"
stopped="${daemons[*]}"
stop_daemons
for pid in $stopped; do
    ! kill -0 "$pid" 2>/dev/null || fail "daemon $pid did not stop"
done
say "daemons stopped (pids $stopped)"
say "all checks passed"
