#!/usr/bin/env bash
# Single-node Slurm cluster for leeward's scheduler tests.
#
#   bash tests/slurm/cluster.sh start  DIR   # install if needed, start, print SLURM_CONF=DIR/slurm.conf
#   bash tests/slurm/cluster.sh stop   DIR   # cancel jobs, stop slurmd, slurmctld, munged; wait until gone
#   bash tests/slurm/cluster.sh status DIR   # daemons, sinfo, squeue
#
# Everything the cluster writes (munge key and socket, slurm.conf, state,
# spool, logs, pid files, job-completion file) lives under DIR; nothing is
# written to /etc or /var except by apt-get when packages are missing.
#
# Exit codes of start: 0 = cluster up (one line SLURM_CONF=... on stdout),
# 2 = usage, 3 = could not start (reason and daemon log tails on stderr).
#
# Environment (all optional):
#   LEEWARD_SLURM_PORT          first of two consecutive TCP ports for
#                               slurmctld/slurmd (default: first free pair
#                               from 6817 up)
#   LEEWARD_SLURM_WAIT          seconds to wait for the node to become idle (60)
#   LEEWARD_SLURM_NO_INSTALL=1  never run apt-get; fail if packages are missing

set -u -o pipefail

PROG=cluster.sh
PACKAGES=(slurm-wlm slurm-wlm-basic-plugins munge)
BINARIES=(munged mungekey munge slurmctld slurmd slurmstepd sinfo squeue sbatch scontrol scancel sacct)

usage() {
    echo "usage: bash tests/slurm/cluster.sh start|stop|status DIR" >&2
    exit 2
}

[ $# -eq 2 ] || usage
ACTION=$1
DIR_ARG=$2
case $ACTION in start|stop|status) ;; *) usage ;; esac

if [ "$ACTION" = start ]; then
    mkdir -p -- "$DIR_ARG" || { echo "$PROG: cannot create $DIR_ARG" >&2; exit 3; }
fi
if [ ! -d "$DIR_ARG" ]; then
    echo "$PROG: $DIR_ARG: no such directory" >&2
    [ "$ACTION" = stop ] && exit 0
    exit 1
fi
DIR=$(cd -- "$DIR_ARG" && pwd -P)

CONF=$DIR/slurm.conf
MUNGE_DIR=$DIR/munge
MUNGE_KEY=$MUNGE_DIR/munge.key
MUNGE_SOCKET=$MUNGE_DIR/munge.socket
MUNGE_LOG=$MUNGE_DIR/munged.log
MUNGE_PID=$MUNGE_DIR/munged.pid
MUNGE_SEED=$MUNGE_DIR/munged.seed
STATE_DIR=$DIR/state
SPOOL_DIR=$DIR/spool
LOG_DIR=$DIR/log
RUN_DIR=$DIR/run
CTLD_PID=$RUN_DIR/slurmctld.pid
SLURMD_PID=$RUN_DIR/slurmd.pid
CTLD_LOG=$LOG_DIR/slurmctld.log
SLURMD_LOG=$LOG_DIR/slurmd.log
JOBCOMP=$LOG_DIR/jobcomp.txt
INSTALL_LOG=$DIR/install.log

export SLURM_CONF=$CONF

# ---------------------------------------------------------------- helpers

log() { echo "$PROG: $*" >&2; }

# A pid is alive if it exists, is not a zombie, and runs the expected program.
alive() { # pid comm
    local pid=$1 comm=$2 st
    [ -n "$pid" ] && [ -r "/proc/$pid/stat" ] || return 1
    st=$(sed -e 's/^.*) //' "/proc/$pid/stat" 2>/dev/null | cut -d' ' -f1) || return 1
    [ "$st" != Z ] && [ "$st" != X ] || return 1
    [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$comm" ]
}

pid_of() { # pidfile
    [ -s "$1" ] && tr -dc '0-9' <"$1"
}

# Send TERM, wait up to $3 s, then KILL and wait 5 s more.
stop_pid() { # pid comm timeout
    local pid=$1 comm=$2 t=${3:-20} i
    alive "$pid" "$comm" || return 0
    kill -TERM "$pid" 2>/dev/null
    for ((i = 0; i < t * 10; i++)); do
        alive "$pid" "$comm" || return 0
        sleep 0.1
    done
    log "$comm ($pid) still running after ${t}s, sending KILL"
    kill -KILL "$pid" 2>/dev/null
    for ((i = 0; i < 50; i++)); do
        alive "$pid" "$comm" || return 0
        sleep 0.1
    done
    log "$comm ($pid) did not go away"
    return 1
}

# Processes named $1 whose environment carries this cluster's SLURM_CONF
# (slurmstepd inherits it from slurmd).
pids_with_conf() { # comm
    local p
    for p in /proc/[0-9]*; do
        [ "$(cat "$p/comm" 2>/dev/null)" = "$1" ] || continue
        tr '\0' '\n' 2>/dev/null <"$p/environ" | grep -qxF "SLURM_CONF=$CONF" || continue
        echo "${p#/proc/}"
    done
}

log_tails() {
    local f
    for f in "$MUNGE_LOG" "$CTLD_LOG" "$SLURMD_LOG" "$LOG_DIR/slurmctld.out" "$LOG_DIR/slurmd.out" "$LOG_DIR/munged.out"; do
        [ -s "$f" ] || continue
        echo "----- tail of $f" >&2
        tail -n 25 "$f" >&2
    done
}

STARTED=()
fail() {
    log "cannot start the Slurm cluster in $DIR: $*"
    log_tails
    # Leave nothing behind that this run started.
    local entry
    for entry in "${STARTED[@]}"; do
        case $entry in
            slurmd) stop_pid "$(pid_of "$SLURMD_PID")" slurmd 10 ;;
            slurmctld) stop_pid "$(pid_of "$CTLD_PID")" slurmctld 10 ;;
            munged) stop_pid "$(pid_of "$MUNGE_PID")" munged 10 ;;
        esac
    done
    exit 3
}

port_listening() { # port
    local hex
    hex=$(printf '%04X' "$1")
    # local_address is field 2 (ADDR:PORT), st is field 4 (0A = LISTEN)
    cat /proc/net/tcp /proc/net/tcp6 2>/dev/null |
        awk -v h=":$hex" 'NR > 0 && $4 == "0A" && substr($2, length($2) - 4) == h { f = 1 } END { exit !f }'
}

choose_ports() {
    local p
    if [ -n "${LEEWARD_SLURM_PORT:-}" ]; then
        CTLD_PORT=$LEEWARD_SLURM_PORT
        SLURMD_PORT=$((LEEWARD_SLURM_PORT + 1))
        return
    fi
    for ((p = 6817; p < 6917; p += 2)); do
        if ! port_listening "$p" && ! port_listening $((p + 1)); then
            CTLD_PORT=$p
            SLURMD_PORT=$((p + 1))
            return
        fi
    done
    fail "no free port pair between 6817 and 6917"
}

# ---------------------------------------------------------------- install

missing_packages() {
    local p out=()
    if command -v dpkg-query >/dev/null 2>&1; then
        for p in "${PACKAGES[@]}"; do
            dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed' || out+=("$p")
        done
    fi
    for p in "${BINARIES[@]}"; do
        command -v "$p" >/dev/null 2>&1 || PATH=$PATH:/usr/sbin:/sbin command -v "$p" >/dev/null 2>&1 || {
            out+=("${PACKAGES[@]}")
            break
        }
    done
    [ ${#out[@]} -gt 0 ] && printf '%s\n' "${out[@]}" | sort -u
}

ensure_installed() {
    local missing t0 t1 secs rc=0 made_policy=
    missing=$(missing_packages)
    [ -z "$missing" ] && return 0
    # shellcheck disable=SC2086
    set -- $missing
    [ "${LEEWARD_SLURM_NO_INSTALL:-}" = 1 ] && fail "missing packages: $* (LEEWARD_SLURM_NO_INSTALL=1)"
    [ "$(id -u)" -eq 0 ] || fail "missing packages: $* (install needs root)"
    command -v apt-get >/dev/null 2>&1 || fail "missing packages: $* (no apt-get)"
    log "installing $* with apt-get (log: $INSTALL_LOG)"
    # The packages' maintainer scripts must not start system-wide daemons
    # from /etc: only the ones under DIR are wanted.
    if [ ! -e /usr/sbin/policy-rc.d ]; then
        printf '#!/bin/sh\nexit 101\n' >/usr/sbin/policy-rc.d && chmod 755 /usr/sbin/policy-rc.d && made_policy=1
    fi
    t0=$(date +%s.%N)
    {
        DEBIAN_FRONTEND=noninteractive apt-get -o DPkg::Lock::Timeout=300 update -qq &&
            DEBIAN_FRONTEND=noninteractive apt-get -o DPkg::Lock::Timeout=300 install -y -qq \
                --no-install-recommends "$@"
    } >"$INSTALL_LOG" 2>&1 || rc=$?
    t1=$(date +%s.%N)
    [ -n "$made_policy" ] && rm -f /usr/sbin/policy-rc.d
    secs=$(awk -v a="$t0" -v b="$t1" 'BEGIN { printf "%.1f", b - a }')
    echo "$secs" >"$DIR/install.seconds"
    if [ "$rc" -ne 0 ]; then
        tail -n 20 "$INSTALL_LOG" >&2
        fail "apt-get failed (exit $rc) after ${secs}s"
    fi
    log "installed $* in ${secs}s"
    missing=$(missing_packages)
    [ -z "$missing" ] || fail "still missing after install: ${missing//$'\n'/ }"
}

# ---------------------------------------------------------------- munge

start_munged() {
    local i
    mkdir -p "$MUNGE_DIR" && chmod 700 "$MUNGE_DIR" || fail "cannot create $MUNGE_DIR"
    if [ ! -s "$MUNGE_KEY" ]; then
        mungekey --create --bits=1024 --keyfile="$MUNGE_KEY" >/dev/null 2>&1 ||
            dd if=/dev/urandom of="$MUNGE_KEY" bs=128 count=1 status=none ||
            fail "cannot create munge key $MUNGE_KEY"
    fi
    # munged runs as root here, so root owns the key.
    chown root:root "$MUNGE_KEY" && chmod 0400 "$MUNGE_KEY" || fail "cannot set mode of $MUNGE_KEY"
    rm -f "$MUNGE_SOCKET" "$MUNGE_SOCKET.lock"
    # --force: DIR is usually a private 0700 directory, which munged would
    # refuse because other users could not reach the socket; only root uses it.
    munged --force \
        --socket="$MUNGE_SOCKET" \
        --key-file="$MUNGE_KEY" \
        --log-file="$MUNGE_LOG" \
        --pid-file="$MUNGE_PID" \
        --seed-file="$MUNGE_SEED" \
        </dev/null >>"$LOG_DIR/munged.out" 2>&1 || fail "munged did not start"
    STARTED+=(munged)
    for ((i = 0; i < 100; i++)); do
        if munge --socket="$MUNGE_SOCKET" --no-input 2>/dev/null |
            unmunge --socket="$MUNGE_SOCKET" >/dev/null 2>&1; then
            return 0
        fi
        sleep 0.1
    done
    fail "munged socket $MUNGE_SOCKET does not answer"
}

# ---------------------------------------------------------------- slurm.conf

write_conf() {
    local probe node cpus boards sockets cores threads mem defmem
    probe=$(slurmd -C 2>/dev/null | head -n 1) || true
    [ -n "$probe" ] || fail "slurmd -C printed nothing"
    field() { echo "$probe" | tr ' ' '\n' | sed -n "s/^$1=//p"; }
    node=$(field NodeName)
    cpus=$(field CPUs)
    boards=$(field Boards)
    sockets=$(field SocketsPerBoard)
    cores=$(field CoresPerSocket)
    threads=$(field ThreadsPerCore)
    mem=$(field RealMemory)
    [ -n "$node" ] && [ -n "$cpus" ] && [ -n "$mem" ] || fail "cannot parse slurmd -C: $probe"
    NODE=$node
    # Unix socket paths (munge socket, slurmstepd sockets in the spool
    # directory) must stay below 108 bytes.
    [ $((${#DIR} + ${#node})) -le 70 ] || fail "DIR path too long for Unix sockets: $DIR"
    # Jobs that give no --mem get this much, so that several fit at once.
    defmem=$((mem / cpus))
    [ "$defmem" -gt 1024 ] && defmem=1024

    cat >"$CONF.tmp" <<EOF
# Single-node Slurm cluster for leeward's tests; written by tests/slurm/cluster.sh.
ClusterName=leeward
SlurmctldHost=$node(127.0.0.1)
SlurmctldPort=$CTLD_PORT
SlurmdPort=$SLURMD_PORT
SlurmUser=root
SlurmdUser=root

AuthType=auth/munge
CredType=cred/munge
# cred_expire also sets how long a requeued job waits before it may start again.
AuthInfo=socket=$MUNGE_SOCKET,cred_expire=10

StateSaveLocation=$STATE_DIR
SlurmdSpoolDir=$SPOOL_DIR
SlurmctldPidFile=$CTLD_PID
SlurmdPidFile=$SLURMD_PID
SlurmctldLogFile=$CTLD_LOG
SlurmdLogFile=$SLURMD_LOG
SlurmctldDebug=info
SlurmdDebug=info
MailProg=/bin/true

ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
SwitchType=switch/none

SchedulerType=sched/backfill
# sched_interval: a requeued job becomes eligible after cred_expire+1 s and
# nothing else wakes the scheduler, so look at pending jobs every 2 s.
SchedulerParameters=bf_interval=5,sched_interval=2
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
DefMemPerCPU=$defmem
ReturnToService=2
SlurmctldTimeout=30
SlurmdTimeout=60
InactiveLimit=0
# A job whose processes ignore SIGTERM stays COMPLETING this long after
# scancel before SIGKILL: long enough for a test to watch the service look
# at a COMPLETING job many times, also on a loaded machine.
KillWait=20
Waittime=0
# Finished jobs stay visible to 'scontrol show job' for this long (seconds).
MinJobAge=3600

JobAcctGatherType=jobacct_gather/linux
JobAcctGatherFrequency=10
AccountingStorageType=accounting_storage/none
# Completed jobs are appended here; 'sacct -c' reads this file.
JobCompType=jobcomp/filetxt
JobCompLoc=$JOBCOMP

NodeName=$node NodeAddr=127.0.0.1 NodeHostname=$node CPUs=$cpus Boards=${boards:-1} SocketsPerBoard=${sockets:-1} CoresPerSocket=${cores:-$cpus} ThreadsPerCore=${threads:-1} RealMemory=$mem State=UNKNOWN
PartitionName=leeward Nodes=$node Default=YES MaxTime=INFINITE State=UP
EOF
    mv "$CONF.tmp" "$CONF" || fail "cannot write $CONF"
}

# ---------------------------------------------------------------- start

node_state() {
    timeout 10 sinfo -h -N -n "$NODE" -o '%t' 2>/dev/null | head -n 1
}

all_running() {
    alive "$(pid_of "$MUNGE_PID")" munged &&
        alive "$(pid_of "$CTLD_PID")" slurmctld &&
        alive "$(pid_of "$SLURMD_PID")" slurmd
}

do_start() {
    local i st waited=${LEEWARD_SLURM_WAIT:-60}
    mkdir -p "$STATE_DIR" "$SPOOL_DIR" "$LOG_DIR" "$RUN_DIR" || fail "cannot create directories under $DIR"

    # Already up from this DIR: just say so.
    if [ -s "$CONF" ] && all_running; then
        NODE=$(sed -n 's/^NodeName=\([^ ]*\).*/\1/p' "$CONF")
        case $(node_state) in
            idle | mix | alloc)
                echo "SLURM_CONF=$CONF"
                exit 0
                ;;
        esac
    fi
    # Anything half-started from this DIR goes first.
    stop_pid "$(pid_of "$SLURMD_PID")" slurmd 10
    stop_pid "$(pid_of "$CTLD_PID")" slurmctld 10
    stop_pid "$(pid_of "$MUNGE_PID")" munged 10

    [ "$(id -u)" -eq 0 ] || fail "must run as root (SlurmUser=root, slurmd launches jobs)"
    ensure_installed
    PATH=$PATH:/usr/sbin:/sbin

    start_munged
    choose_ports
    write_conf

    slurmctld </dev/null >>"$LOG_DIR/slurmctld.out" 2>&1 || fail "slurmctld exited with $?"
    STARTED+=(slurmctld)
    for ((i = 0; i < 200; i++)); do
        timeout 5 scontrol ping 2>/dev/null | grep -q 'is UP' && break
        alive "$(pid_of "$CTLD_PID")" slurmctld || [ $i -lt 20 ] || fail "slurmctld died"
        sleep 0.1
    done
    timeout 5 scontrol ping 2>/dev/null | grep -q 'is UP' || fail "slurmctld does not answer 'scontrol ping'"

    slurmd </dev/null >>"$LOG_DIR/slurmd.out" 2>&1 || fail "slurmd exited with $?"
    STARTED+=(slurmd)

    for ((i = 0; i < waited * 4; i++)); do
        st=$(node_state)
        case $st in
            idle) break ;;
            drain* | drng* | fail* | down) ;;  # ReturnToService=2 may still clear it
        esac
        alive "$(pid_of "$SLURMD_PID")" slurmd || [ $i -lt 8 ] || fail "slurmd died"
        alive "$(pid_of "$CTLD_PID")" slurmctld || fail "slurmctld died"
        sleep 0.25
    done
    if [ "$st" != idle ]; then
        timeout 5 sinfo -N -l >&2 2>/dev/null
        timeout 5 scontrol show node "$NODE" >&2 2>/dev/null
        fail "node $NODE is '${st:-unknown}', not idle, after ${waited}s"
    fi
    echo "SLURM_CONF=$CONF"
    exit 0
}

# ---------------------------------------------------------------- stop

do_stop() {
    local i ids p rc=0
    PATH=$PATH:/usr/sbin:/sbin
    if [ -s "$CONF" ] && alive "$(pid_of "$CTLD_PID")" slurmctld && alive "$(pid_of "$MUNGE_PID")" munged; then
        # Cancel what is left so that no job processes outlive the cluster.
        ids=$(timeout 10 squeue -h -o '%A' 2>/dev/null | tr '\n' ' ')
        if [ -n "${ids// /}" ]; then
            # shellcheck disable=SC2086
            timeout 10 scancel $ids 2>/dev/null
            for ((i = 0; i < 80; i++)); do
                [ -z "$(timeout 5 squeue -h -t running,completing,configuring -o '%A' 2>/dev/null)" ] && break
                sleep 0.25
            done
        fi
    fi
    stop_pid "$(pid_of "$SLURMD_PID")" slurmd 20 || rc=1
    for p in $(pids_with_conf slurmstepd); do
        stop_pid "$p" slurmstepd 10 || rc=1
    done
    stop_pid "$(pid_of "$CTLD_PID")" slurmctld 20 || rc=1
    stop_pid "$(pid_of "$MUNGE_PID")" munged 10 || rc=1
    exit $rc
}

# ---------------------------------------------------------------- status

do_status() {
    local rc=0 name pidf pid
    PATH=$PATH:/usr/sbin:/sbin
    for name in munged slurmctld slurmd; do
        case $name in
            munged) pidf=$MUNGE_PID ;;
            slurmctld) pidf=$CTLD_PID ;;
            slurmd) pidf=$SLURMD_PID ;;
        esac
        pid=$(pid_of "$pidf")
        if alive "$pid" "$name"; then
            echo "$name: running (pid $pid)"
        else
            echo "$name: not running"
            rc=1
        fi
    done
    echo "SLURM_CONF=$CONF"
    if [ $rc -eq 0 ]; then
        timeout 10 sinfo || rc=1
        timeout 10 squeue || rc=1
    fi
    exit $rc
}

case $ACTION in
    start) do_start ;;
    stop) do_stop ;;
    status) do_status ;;
esac
