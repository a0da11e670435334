#!/usr/bin/env bash
# one-node-cluster.sh: end-to-end check of fringemill's Slurm sharding on this machine.
#
# Brings up a throw-away one-node Slurm cluster from Debian's packages (installing slurmctld,
# slurmd, slurm-client and munge when missing), submits a small job as a 3-task job array using
# tools/slurm/fringemill-array.sbatch plus a dependent `fringemill assemble` job, waits for both,
# runs the same job single-process and checks that the two TIFFs are byte-identical.
# Everything it starts is stopped again on exit, and its temporary folder is removed.
#
# Usage (as root; no terminal needed):
#   bash tools/slurm/one-node-cluster.sh [FRINGEMILL_BINARY]
# FRINGEMILL_BINARY defaults to target/release/fringemill under the repository root; the script
# builds nothing (run `cargo build --release` first).
#
# Environment knobs:
#   FRINGEMILL_SLURM_WAIT=300   seconds allowed for the array + assemble jobs to finish
#   FRINGEMILL_SLURM_KEEP=1     keep the temporary folder for a post-mortem (the next run
#                               removes it)
#
# Re-runnable: daemons left behind by an earlier run that was killed are stopped first.
# Exit status: 0 when the check passed, non-zero (with the failing step and log tails) otherwise.
set -euo pipefail

T0=$EPOCHREALTIME
SCRIPT_DIR=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
REPO_ROOT=$(cd "$SCRIPT_DIR/../.." && pwd)
SBATCH_TEMPLATE=$SCRIPT_DIR/fringemill-array.sbatch
WAIT_SECS=${FRINGEMILL_SLURM_WAIT:-300}
KEEP_TMP=${FRINGEMILL_SLURM_KEEP:-0}
TMP_PREFIX=/tmp/fringemill-one-node.
PACKAGES=(slurmctld slurmd slurm-client munge)
SHARDS=3
MUNGE_PID_FILE=/run/munge/munged.pid
POLICY_RC=/usr/sbin/policy-rc.d
POLICY_RC_MARK="temporary: tools/slurm/one-node-cluster.sh (no daemon starts during its apt-get)"

WORK=""              # temporary folder of this run
STEP="start"         # current step, named in failure reports
RELEVANT_LOGS=()     # logs whose last lines a failure report shows
FAILED_REPORTED=0
APT_SECS=0
POLICY_RC_OURS=0
STARTED_MUNGED=0     # cleanup stops munged only once this run has taken it over
ARRAY_ID=""
ASSEMBLE_ID=""
VERDICT=""

# ---------------------------------------------------------------------------------------------
# helpers

elapsed() { awk -v a="$T0" -v b="$EPOCHREALTIME" 'BEGIN { printf "%.1f", b - a }'; }

say() { echo "    $*"; }

step() {
    STEP=$1
    echo "==> [$(elapsed) s] $1"
}

show_logs() {
    local f
    for f in "$@"; do
        [[ -f $f ]] || continue
        echo "----- last lines of $f -----"
        tail -n 25 "$f" | sed 's/^/  | /'
    done
}

# fail MESSAGE: report the failing step with the relevant log tails, then exit non-zero.
fail() {
    FAILED_REPORTED=1
    {
        echo "FAIL: step '$STEP': $*"
        if ((${#RELEVANT_LOGS[@]})); then
            show_logs "${RELEVANT_LOGS[@]}"
            echo "FAIL: step '$STEP': $*"
        fi
    } >&2
    VERDICT="FAIL (step '$STEP')"
    exit 1
}

# Is a process with this pid alive and called NAME (by /proc/PID/comm)?
pid_is() {
    local pid=$1 name=$2 comm
    [[ $pid =~ ^[0-9]+$ ]] || return 1
    comm=$(cat "/proc/$pid/comm" 2>/dev/null) || return 1
    [[ $comm == "$name" ]]
}

# stop_pid PID NAME: SIGTERM, up to 10 s grace, then SIGKILL. Only touches a live NAME process.
stop_pid() {
    local pid=$1 name=$2 i
    pid_is "$pid" "$name" || return 0
    kill -TERM "$pid" 2>/dev/null || return 0
    for ((i = 0; i < 80; i++)); do
        if ! pid_is "$pid" "$name"; then
            say "stopped $name (pid $pid) in $(awk -v i="$i" 'BEGIN { printf "%.2f", i / 8 }') s"
            return 0
        fi
        sleep 0.125
    done
    say "$name (pid $pid) ignored SIGTERM: SIGKILL"
    kill -KILL "$pid" 2>/dev/null || true
    for ((i = 0; i < 20; i++)); do
        pid_is "$pid" "$name" || return 0
        sleep 0.25
    done
    return 0
}

# The pid in a pid file (empty when the file is missing).
read_pid() { tr -dc '0-9' 2>/dev/null <"$1" || true; }

stop_by_pid_file() {
    local file=$1 name=$2 pid
    [[ -f $file ]] || return 0
    pid=$(read_pid "$file")
    [[ -n $pid ]] && stop_pid "$pid" "$name"
    return 0
}

stop_munged() {
    stop_by_pid_file "$MUNGE_PID_FILE" munged
}

# Daemons and jobs of an earlier run of this script (killed before its trap ran): its jobs are
# cancelled while its slurmctld still answers, its daemons stopped by the pid files in its
# temporary folder; then any slurmctld/slurmd still running on a config under our prefix, and any
# slurmstepd or job process whose environment names such a config (the lock taken at the start
# ensures no other run of this script is alive).
stop_leftovers() {
    local d p cmd name ids i found=0
    for d in "$TMP_PREFIX"*; do
        [[ -d $d && $d != "$WORK" ]] || continue
        found=1
        say "leftover folder $d"
        if [[ -f $d/etc/slurm.conf && -f $d/run/slurmctld.pid ]] && pid_is "$(read_pid "$d/run/slurmctld.pid")" slurmctld; then
            ids=$(SLURM_CONF=$d/etc/slurm.conf timeout 10 squeue -h -o %A 2>/dev/null | tr '\n' ' ' || true)
            if [[ -n ${ids// /} ]]; then
                say "cancelling its jobs: $ids"
                # shellcheck disable=SC2086 # a list of job ids
                SLURM_CONF=$d/etc/slurm.conf timeout 10 scancel $ids >/dev/null 2>&1 || true
                for ((i = 0; i < 20; i++)); do
                    [[ -z $(SLURM_CONF=$d/etc/slurm.conf timeout 5 squeue -h -o %A 2>/dev/null) ]] && break
                    sleep 0.5
                done
            fi
        fi
        stop_by_pid_file "$d/run/slurmd.pid" slurmd
        stop_by_pid_file "$d/run/slurmctld.pid" slurmctld
    done
    for p in /proc/[0-9]*; do
        name=$(cat "$p/comm" 2>/dev/null) || continue
        [[ $name == slurmctld || $name == slurmd ]] || continue
        cmd=$(tr '\0' ' ' 2>/dev/null <"$p/cmdline") || continue
        if [[ $cmd == *"$TMP_PREFIX"* && $cmd != *"$WORK/"* ]]; then
            found=1
            stop_pid "${p#/proc/}" "$name"
        fi
    done
    for p in /proc/[0-9]*; do
        [[ ${p#/proc/} != "$$" ]] || continue
        name=$(cat "$p/comm" 2>/dev/null) || continue
        cmd=$(tr '\0' '\n' 2>/dev/null <"$p/environ" | grep -E '^(SLURM_CONF|SLURM_JOB_ID)=' || true)
        [[ $name == slurmstepd || $cmd == *SLURM_JOB_ID=* ]] || continue # job processes only
        if [[ $cmd == *"SLURM_CONF=$TMP_PREFIX"* && $cmd != *"SLURM_CONF=$WORK/"* ]]; then
            found=1
            stop_pid "${p#/proc/}" "$name"
        fi
    done
    for d in "$TMP_PREFIX"*; do
        [[ -d $d && $d != "$WORK" ]] || continue
        rm -rf "$d"
    done
    ((found)) || say "none found"
}

# Is something listening on 127.0.0.1:PORT?
port_busy() {
    timeout 2 bash -c "exec 3<>/dev/tcp/127.0.0.1/$1" 2>/dev/null
}

# wait_for SECONDS COMMAND...: poll COMMAND every 0.5 s until it succeeds; 1 on timeout.
wait_for() {
    local secs=$1 end
    shift
    end=$((SECONDS + secs))
    until "$@"; do
        ((SECONDS < end)) || return 1
        sleep 0.5
    done
}

# All JobState values of a job (one per array task record; a pending array's tasks may share one).
job_states() {
    timeout 10 scontrol -o show job "$1" 2>/dev/null | grep -o 'JobState=[A-Z_]*' | cut -d= -f2 || true
}

is_terminal() {
    case $1 in
        COMPLETED | FAILED | CANCELLED | TIMEOUT | NODE_FAIL | OUT_OF_MEMORY | BOOT_FAIL | DEADLINE | PREEMPTED) return 0 ;;
        *) return 1 ;;
    esac
}

# ---------------------------------------------------------------------------------------------
# cleanup: runs on every exit

cleanup() {
    local rc=$?
    set +e
    trap - EXIT INT TERM
    if ((rc != 0 && !FAILED_REPORTED)); then
        {
            echo "FAIL: step '$STEP' ended unexpectedly (exit status $rc)"
            if ((${#RELEVANT_LOGS[@]})); then
                show_logs "${RELEVANT_LOGS[@]}"
            fi
        } >&2
        VERDICT="FAIL (step '$STEP')"
    fi
    echo "==> [$(elapsed) s] cleanup"
    if [[ -n $WORK && -f $WORK/run/slurmctld.pid ]] && pid_is "$(read_pid "$WORK/run/slurmctld.pid")" slurmctld; then
        local ids=() i
        [[ -n $ARRAY_ID ]] && ids+=("$ARRAY_ID")
        [[ -n $ASSEMBLE_ID ]] && ids+=("$ASSEMBLE_ID")
        if ((${#ids[@]})) && [[ -n $(timeout 5 squeue -h -o %A 2>/dev/null) ]]; then
            say "cancelling jobs still queued or running"
            timeout 10 scancel "${ids[@]}" >/dev/null 2>&1
            # Let slurmd end the job steps before it goes away itself.
            for ((i = 0; i < 20; i++)); do
                [[ -z $(timeout 5 squeue -h -t RUNNING,COMPLETING -o %i 2>/dev/null) ]] && break
                sleep 0.5
            done
        fi
    fi
    if [[ -n $WORK ]]; then
        stop_by_pid_file "$WORK/run/slurmd.pid" slurmd
        stop_by_pid_file "$WORK/run/slurmctld.pid" slurmctld
    fi
    ((STARTED_MUNGED)) && stop_munged
    if ((POLICY_RC_OURS)); then
        rm -f "$POLICY_RC"
    fi
    if [[ -n $WORK && -d $WORK ]]; then
        if [[ $KEEP_TMP == 1 ]]; then
            say "kept $WORK (FRINGEMILL_SLURM_KEEP=1)"
        else
            rm -rf "$WORK"
            say "removed $WORK"
        fi
    fi
    [[ -n $VERDICT ]] || VERDICT=$([[ $rc == 0 ]] && echo PASS || echo "FAIL (step '$STEP')")
    echo "one-node-cluster: $VERDICT; total $(elapsed) s, of which apt-get $APT_SECS s"
    exit "$rc"
}
if [[ ${1:-} == -h || ${1:-} == --help ]]; then
    awk 'NR > 1 && /^#/ { sub(/^# ?/, ""); print; next } NR > 1 { exit }' "${BASH_SOURCE[0]}"
    exit 0
fi

trap cleanup EXIT
trap 'exit 130' INT
trap 'exit 143' TERM

# ---------------------------------------------------------------------------------------------
# 1. preconditions

step "checking preconditions"
[[ $(id -u) == 0 ]] || fail "must run as root (it installs packages and starts munged and slurm daemons)"
BIN=${1:-$REPO_ROOT/target/release/fringemill}
[[ $BIN == /* ]] || BIN=$PWD/$BIN
[[ -f $BIN && -x $BIN ]] || fail "fringemill binary not found or not executable: $BIN (build it with 'cargo build --release' in $REPO_ROOT, or pass its path as the first argument)"
timeout 20 "$BIN" run --help 2>/dev/null </dev/null | grep -q -- '--shard' || fail "$BIN does not look like a fringemill with 'run --shard' (rebuild it)"
[[ -f $SBATCH_TEMPLATE ]] || fail "missing $SBATCH_TEMPLATE"
for f in "$REPO_ROOT/samples/badge.toml" "$REPO_ROOT/samples/badge_points.ply"; do
    [[ -f $f ]] || fail "missing sample file $f"
done
[[ $WAIT_SECS =~ ^[0-9]+$ ]] || fail "FRINGEMILL_SLURM_WAIT must be a number of seconds, not '$WAIT_SECS'"
say "binary:   $BIN ($(timeout 10 "$BIN" --version </dev/null 2>/dev/null || echo '?'))"
say "template: $SBATCH_TEMPLATE"

# One run at a time on a machine (they would share munged and the ports).
# Daemons are started with fd 9 closed so that they never hold the lock.
exec 9>/tmp/fringemill-one-node-lock
flock -w 5 9 || fail "another run of this script holds /tmp/fringemill-one-node-lock"
WORK=$(mktemp -d "${TMP_PREFIX}XXXXXX")
mkdir -p "$WORK"/{etc,run,log,state,spool,sharded,single}
say "temporary folder: $WORK"

# ---------------------------------------------------------------------------------------------
# 2. packages

step "checking Debian packages: ${PACKAGES[*]}"
if grep -qs "$POLICY_RC_MARK" "$POLICY_RC"; then
    rm -f "$POLICY_RC" # left behind by a run killed during apt-get
fi
missing=()
for p in "${PACKAGES[@]}"; do
    if ! dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed'; then
        missing+=("$p")
    fi
done
if ((${#missing[@]})); then
    RELEVANT_LOGS=("$WORK/log/apt.log")
    say "missing: ${missing[*]}"
    apt_t0=$EPOCHREALTIME
    # Keep the packages' maintainer scripts from starting daemons with their default configs.
    if [[ ! -e $POLICY_RC ]]; then
        printf '#!/bin/sh\n# %s\nexit 101\n' "$POLICY_RC_MARK" >"$POLICY_RC"
        chmod 755 "$POLICY_RC"
        POLICY_RC_OURS=1
    fi
    say "apt-get update (log: $WORK/log/apt.log)"
    DEBIAN_FRONTEND=noninteractive timeout 600 apt-get update </dev/null >>"$WORK/log/apt.log" 2>&1 ||
        fail "apt-get update failed or timed out"
    say "apt-get install ${PACKAGES[*]}"
    DEBIAN_FRONTEND=noninteractive timeout 900 apt-get install -y --no-install-recommends \
        -o DPkg::Lock::Timeout=120 "${PACKAGES[@]}" </dev/null >>"$WORK/log/apt.log" 2>&1 ||
        fail "apt-get install ${PACKAGES[*]} failed or timed out"
    if ((POLICY_RC_OURS)); then
        rm -f "$POLICY_RC"
        POLICY_RC_OURS=0
    fi
    APT_SECS=$(awk -v a="$apt_t0" -v b="$EPOCHREALTIME" 'BEGIN { printf "%.1f", b - a }')
    say "installed in $APT_SECS s"
else
    say "all installed; apt-get not needed"
fi
say "slurm: $(timeout 10 slurmctld -V 2>/dev/null || echo '?')"

# ---------------------------------------------------------------------------------------------
# 3. leftovers of earlier runs

step "stopping leftovers of earlier runs"
stop_leftovers
STARTED_MUNGED=1     # from here on, munged is this run's to stop
stop_munged

# ---------------------------------------------------------------------------------------------
# 4. munge

step "setting up munge"
RELEVANT_LOGS=(/var/log/munge/munged.log)
getent passwd munge >/dev/null || fail "user 'munge' does not exist (is the munge package installed?)"
if [[ ! -s /etc/munge/munge.key ]]; then
    say "creating /etc/munge/munge.key (1024 random bytes)"
    mkdir -p /etc/munge
    dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
fi
chown munge:munge /etc/munge /etc/munge/munge.key
chmod 700 /etc/munge
chmod 400 /etc/munge/munge.key
mkdir -p /run/munge /var/log/munge /var/lib/munge
chown munge:munge /run/munge /var/log/munge /var/lib/munge
chmod 755 /run/munge
rm -f /run/munge/munge.socket.2 /run/munge/munge.socket.2.lock "$MUNGE_PID_FILE"

step "starting munged"
timeout 30 runuser -u munge -- /usr/sbin/munged </dev/null 9>&- || fail "munged did not start"
wait_for 15 test -s "$MUNGE_PID_FILE" || fail "munged wrote no pid file $MUNGE_PID_FILE"
munge_ok() { timeout 10 munge -n </dev/null 2>/dev/null | timeout 10 unmunge 2>/dev/null | grep -q 'STATUS: *Success'; }
wait_for 15 munge_ok || fail "'munge -n | unmunge' does not say Success"
say "munged pid $(cat "$MUNGE_PID_FILE"); munge -n | unmunge: Success"

# ---------------------------------------------------------------------------------------------
# 5. slurm.conf

step "writing slurm.conf"
HOST=$(hostname -s)
NCPU=$(nproc)
if command -v free >/dev/null; then
    MEM_MB=$(free -m | awk '/^Mem:/ { print $2 }')
else
    MEM_MB=$(awk '/^MemTotal:/ { print int($2 / 1024) }' /proc/meminfo)
fi
[[ $MEM_MB =~ ^[0-9]+$ ]] || fail "could not read the memory size"
REAL_MEM=$((MEM_MB * 95 / 100))
CTLD_PORT="" SLURMD_PORT=""
for pair in "6817 6818" "16817 16818" "26817 26818"; do
    read -r a b <<<"$pair"
    if ! port_busy "$a" && ! port_busy "$b"; then
        CTLD_PORT=$a SLURMD_PORT=$b
        break
    fi
    say "ports $a/$b are in use by something else: trying others"
done
[[ -n $CTLD_PORT ]] || fail "no free pair of ports for slurmctld/slurmd (6817/6818, 16817/16818, 26817/26818 all in use)"
CONF=$WORK/etc/slurm.conf
cat >"$CONF" <<EOF
# Throw-away one-node cluster of tools/slurm/one-node-cluster.sh (no cgroups, no accounting).
ClusterName=fringemill
SlurmctldHost=$HOST(127.0.0.1)
SlurmctldPort=$CTLD_PORT
SlurmdPort=$SLURMD_PORT
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
MinJobAge=3600
StateSaveLocation=$WORK/state
SlurmdSpoolDir=$WORK/spool
SlurmctldPidFile=$WORK/run/slurmctld.pid
SlurmdPidFile=$WORK/run/slurmd.pid
SlurmctldLogFile=$WORK/log/slurmctld.log
SlurmdLogFile=$WORK/log/slurmd.log
NodeName=$HOST NodeAddr=127.0.0.1 CPUs=$NCPU RealMemory=$REAL_MEM State=UNKNOWN
PartitionName=debug Nodes=$HOST Default=YES MaxTime=INFINITE State=UP
EOF
export SLURM_CONF=$CONF
say "$CONF: node $HOST, CPUs=$NCPU, RealMemory=$REAL_MEM MB, ports $CTLD_PORT/$SLURMD_PORT"

# ---------------------------------------------------------------------------------------------
# 6. slurm daemons

step "starting slurmctld"
RELEVANT_LOGS=("$WORK/log/slurmctld.log")
timeout 30 slurmctld -f "$CONF" </dev/null 9>&- || fail "slurmctld did not start"
wait_for 20 test -s "$WORK/run/slurmctld.pid" || fail "slurmctld wrote no pid file"
ctld_up() { timeout 5 scontrol ping 2>/dev/null | grep -q 'is UP'; }
wait_for 30 ctld_up || fail "slurmctld does not answer 'scontrol ping'"
say "slurmctld pid $(cat "$WORK/run/slurmctld.pid") is up"

step "starting slurmd"
RELEVANT_LOGS=("$WORK/log/slurmctld.log" "$WORK/log/slurmd.log")
timeout 30 slurmd -f "$CONF" </dev/null 9>&- || fail "slurmd did not start"
wait_for 20 test -s "$WORK/run/slurmd.pid" || fail "slurmd wrote no pid file"
say "slurmd pid $(cat "$WORK/run/slurmd.pid")"

step "waiting for node $HOST to be idle (at most 60 s)"
node_state() { timeout 5 sinfo -h -N -n "$HOST" -o %T 2>/dev/null | head -n 1; }
node_idle() { [[ $(node_state) == idle ]]; }
if ! wait_for 60 node_idle; then
    fail "node $HOST is '$(node_state)', not idle; reason: $(timeout 5 sinfo -h -R 2>/dev/null || true)"
fi
say "$(timeout 5 sinfo 2>/dev/null | tr '\n' ';' | sed 's/;/; /g')"

# ---------------------------------------------------------------------------------------------
# 7. the job

step "making the test job (samples/badge.toml at 1024 x 1024)"
RELEVANT_LOGS=()
JOB=$WORK/sharded/badge.toml
sed -E -e 's/^(width_px *= *)[0-9]+/\11024/' -e 's/^(height_px *= *)[0-9]+/\11024/' \
    "$REPO_ROOT/samples/badge.toml" >"$JOB"
if ! grep -Eq '^width_px *= *1024\b' "$JOB" || ! grep -Eq '^height_px *= *1024\b' "$JOB"; then
    fail "could not set width_px/height_px to 1024 in a copy of samples/badge.toml"
fi
grep -q 'badge_points.ply' "$JOB" || fail "samples/badge.toml no longer refers to badge_points.ply"
cp "$REPO_ROOT/samples/badge_points.ply" "$WORK/sharded/"
cp "$JOB" "$REPO_ROOT/samples/badge_points.ply" "$WORK/single/"
OUT_REL=$(sed -nE 's/^path *= *"([^"]+)".*/\1/p' "$JOB" | head -n 1)
[[ -n $OUT_REL ]] || fail "no [output] path in the job"
say "job: $JOB (output $OUT_REL)"
timeout 60 "$BIN" plan "$JOB" </dev/null >"$WORK/log/plan.txt" 2>&1 || {
    RELEVANT_LOGS=("$WORK/log/plan.txt")
    fail "'fringemill plan' rejects the job"
}

# ---------------------------------------------------------------------------------------------
# 8. submit

step "submitting a job array of $SHARDS shards (sbatch $SBATCH_TEMPLATE)"
RELEVANT_LOGS=("$WORK/log/slurmctld.log" "$WORK/log/slurmd.log")
ARRAY_ID=$(timeout 30 sbatch --parsable --array=1-$SHARDS --cpus-per-task=1 --time=10 \
    --chdir="$WORK/sharded" --output="$WORK/log/array-%A_%a.out" \
    --export=ALL,JOB="$JOB",FRINGEMILL="$BIN" "$SBATCH_TEMPLATE" </dev/null 2>"$WORK/log/sbatch.err") || {
    RELEVANT_LOGS+=("$WORK/log/sbatch.err")
    fail "sbatch of the array was refused"
}
ARRAY_ID=${ARRAY_ID%%;*}
say "array job $ARRAY_ID"

step "submitting the assemble job (--dependency=afterok:$ARRAY_ID)"
# shellcheck disable=SC2016 # $FRINGEMILL and $JOB expand inside the job, from --export
ASSEMBLE_ID=$(timeout 30 sbatch --parsable --dependency=afterok:"$ARRAY_ID" --kill-on-invalid-dep=yes \
    --job-name=fringemill-assemble --cpus-per-task=1 --time=10 \
    --chdir="$WORK/sharded" --output="$WORK/log/assemble-%j.out" \
    --export=ALL,JOB="$JOB",FRINGEMILL="$BIN" \
    --wrap='exec "$FRINGEMILL" assemble --quiet --log-progress "$JOB"' </dev/null 2>"$WORK/log/sbatch.err") || {
    RELEVANT_LOGS+=("$WORK/log/sbatch.err")
    fail "sbatch of the assemble job was refused"
}
ASSEMBLE_ID=${ASSEMBLE_ID%%;*}
say "assemble job $ASSEMBLE_ID"

# ---------------------------------------------------------------------------------------------
# 9. wait (accounting is off: job states come from `scontrol show job`)

step "waiting for the array and the assemble job (at most $WAIT_SECS s)"
job_logs() {
    RELEVANT_LOGS=("$WORK/log/slurmctld.log" "$WORK/log/slurmd.log")
    local f
    for f in "$WORK"/log/array-*.out "$WORK"/log/assemble-*.out; do
        [[ -f $f ]] && RELEVANT_LOGS+=("$f")
    done
    return 0
}
summary() { # counts of states, e.g. "2 RUNNING, 1 PENDING"
    sort | uniq -c | awk '{ printf "%s%s %s", (NR > 1 ? ", " : ""), $1, $2 }'
}
wait_t0=$SECONDS
last=""
while :; do
    mapfile -t arr < <(job_states "$ARRAY_ID")
    asm=$(job_states "$ASSEMBLE_ID" | head -n 1)
    line="array $ARRAY_ID: $(printf '%s\n' "${arr[@]}" | { grep . || true; } | summary); assemble $ASSEMBLE_ID: ${asm:-?}"
    if [[ $line != "$last" ]]; then
        say "[$(elapsed) s] $line"
        last=$line
    fi
    done_all=1
    ((${#arr[@]})) || done_all=0
    for s in "${arr[@]}" "$asm"; do
        is_terminal "$s" || done_all=0
    done
    ((done_all)) && break
    if ! pid_is "$(read_pid "$WORK/run/slurmctld.pid")" slurmctld; then
        job_logs
        fail "slurmctld died"
    fi
    if ! pid_is "$(read_pid "$WORK/run/slurmd.pid")" slurmd; then
        job_logs
        fail "slurmd died"
    fi
    if ((SECONDS - wait_t0 >= WAIT_SECS)); then
        job_logs
        fail "the jobs did not finish within $WAIT_SECS s ($line)"
    fi
    sleep 1
done
job_logs
completed=$(printf '%s\n' "${arr[@]}" | grep -c '^COMPLETED$' || true)
((completed == SHARDS)) || { STEP="array job"; fail "$completed of $SHARDS array tasks COMPLETED ($line)"; }
[[ $asm == COMPLETED ]] || { STEP="assemble job"; fail "assemble job ended $asm"; }
say "all $SHARDS array tasks and the assemble job COMPLETED after $((SECONDS - wait_t0)) s"
for f in "$WORK"/log/array-*.out "$WORK"/log/assemble-*.out; do
    say "$(basename "$f"): $(grep -v '^[[:space:]]*$' "$f" | tail -n 1)"
done

SHARDED_TIF=$WORK/sharded/$OUT_REL
[[ -s $SHARDED_TIF ]] || fail "the assemble job left no $SHARDED_TIF"
leftover_parts=$(find "$(dirname "$SHARDED_TIF")" -name '*.part-*' | wc -l)
((leftover_parts == 0)) || fail "$leftover_parts part files were left beside $SHARDED_TIF after assemble"

# ---------------------------------------------------------------------------------------------
# 10. single-process reference and comparison

step "running the same job single-process (no Slurm) into $WORK/single"
RELEVANT_LOGS=("$WORK/log/single.txt")
timeout 300 "$BIN" run --quiet "$WORK/single/badge.toml" </dev/null >"$WORK/log/single.txt" 2>&1 ||
    fail "the single-process run failed or timed out"
SINGLE_TIF=$WORK/single/$OUT_REL
[[ -s $SINGLE_TIF ]] || fail "the single-process run left no $SINGLE_TIF"

step "comparing the two TIFFs byte for byte"
RELEVANT_LOGS=()
say "sharded: $(sha256sum "$SHARDED_TIF" | cut -c1-64)  $(stat -c %s "$SHARDED_TIF") bytes"
say "single:  $(sha256sum "$SINGLE_TIF" | cut -c1-64)  $(stat -c %s "$SINGLE_TIF") bytes"
if cmp "$SHARDED_TIF" "$SINGLE_TIF"; then
    echo "PASS: Slurm array of $SHARDS shards + assemble gives the byte-identical TIFF of a single-process run ($(stat -c %s "$SINGLE_TIF") bytes)"
    VERDICT=PASS
else
    fail "the sharded TIFF differs from the single-process one"
fi
