#!/usr/bin/env bash
# Start a one-node SLURM cluster on this machine (for scale-out tests of the
# workflow through Snakemake's SLURM executor). Needs root and Debian/Ubuntu
# packages; no systemd is used. Idempotent: daemons already running (by their
# pid files) are left alone, a changed slurm.conf restarts the SLURM daemons.
#
#   sudo bash benchmarks/local_slurm/start_cluster.sh      # then sinfo / sbatch
#   sudo bash benchmarks/local_slurm/stop_cluster.sh
#
# Environment: SLURM_MEM_HEADROOM_MB (default 2048) is kept back from the
# node's memory; SLURM_WAIT_S (default 60) bounds the wait for the idle node.
set -euo pipefail

HOST=$(hostname)
NCPU=$(nproc)
HEADROOM_MB=${SLURM_MEM_HEADROOM_MB:-2048}
WAIT_S=${SLURM_WAIT_S:-60}
CONF=/etc/slurm/slurm.conf
MUNGE_PID=/run/munge/munged.pid
CTLD_PID=/run/slurmctld.pid
SLURMD_PID=/run/slurmd.pid

say() { echo "[start_cluster] $*"; }
die() { echo "[start_cluster] ERROR: $*" >&2; exit 1; }

[ "$(id -u)" -eq 0 ] || die "run as root (installs packages and starts daemons)"

# Is the process named in pid file $1 alive?
alive() { [ -s "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null; }

# 1. packages -------------------------------------------------------------
if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null \
        || ! command -v munged >/dev/null || ! command -v sinfo >/dev/null; then
    say "installing slurm-wlm and munge (apt-get)"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq
    apt-get install -y -qq slurm-wlm munge >/dev/null
fi

# 2. munge ----------------------------------------------------------------
mkdir -p /etc/munge /var/log/munge /run/munge /var/lib/munge
KEY=/etc/munge/munge.key
if ! alive "$MUNGE_PID"; then
    # Our own key: 1024 random bytes (the package may ship a shorter one).
    if [ ! -s "$KEY" ] || [ "$(stat -c %s "$KEY")" -ne 1024 ]; then
        say "creating $KEY (1024 random bytes)"
        dd if=/dev/urandom of="$KEY" bs=1024 count=1 status=none
    fi
fi
chown -R munge:munge /etc/munge /var/log/munge /run/munge /var/lib/munge
chmod 400 "$KEY"
chmod 700 /etc/munge
if alive "$MUNGE_PID"; then
    say "munged already running (pid $(cat "$MUNGE_PID"))"
else
    rm -f "$MUNGE_PID"
    say "starting munged"
    runuser -u munge -- /usr/sbin/munged --force
    for _ in $(seq 1 50); do alive "$MUNGE_PID" && break; sleep 0.1; done
fi
munge -n | unmunge | grep -q 'STATUS: *Success' || die "munge -n | unmunge does not succeed (see /var/log/munge/munged.log)"
say "munge works"

# 3. slurm.conf -----------------------------------------------------------
MEM_TOTAL_MB=$(awk '/^MemTotal:/ {print int($2 / 1024)}' /proc/meminfo)
REAL_MB=$(( MEM_TOTAL_MB - HEADROOM_MB ))
[ "$REAL_MB" -gt 512 ] || die "too little memory for a node: ${MEM_TOTAL_MB} MB total, headroom ${HEADROOM_MB} MB"
mkdir -p /etc/slurm /var/spool/slurmctld /var/spool/slurmd /var/log/slurm
NEW_CONF=$(mktemp)
cat >"$NEW_CONF" <<EOF
# One-node test cluster written by benchmarks/local_slurm/start_cluster.sh
ClusterName=localtest
SlurmctldHost=${HOST}
AuthType=auth/munge
CredType=cred/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
ReturnToService=2
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
AccountingStorageType=accounting_storage/none
# Sample each job's memory every 2 s and kill a job that uses more than it
# asked for (--mem from the rule's mem_mb), as most production clusters do.
JobAcctGatherType=jobacct_gather/linux
JobAcctGatherFrequency=task=2
JobAcctGatherParams=OverMemoryKill
JobCompType=jobcomp/filetxt
JobCompLoc=/var/log/slurm/jobcomp.log
SlurmUser=root
SlurmdUser=root
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=${CTLD_PID}
SlurmdPidFile=${SLURMD_PID}
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
SlurmctldTimeout=30
SlurmdTimeout=30
InactiveLimit=0
MinJobAge=300
KillWait=10
Waittime=0
NodeName=${HOST} CPUs=${NCPU} RealMemory=${REAL_MB} State=UNKNOWN
PartitionName=main Nodes=${HOST} Default=YES MaxTime=INFINITE State=UP
EOF
RESTART=0
if [ -f "$CONF" ] && cmp -s "$NEW_CONF" "$CONF"; then
    rm -f "$NEW_CONF"
else
    say "writing $CONF (node ${HOST}: ${NCPU} CPUs, ${REAL_MB} MB)"
    mv "$NEW_CONF" "$CONF"
    chmod 644 "$CONF"
    RESTART=1
fi

# 4. slurmctld, slurmd ----------------------------------------------------
stop_pid() {  # stop_pid PIDFILE NAME
    if alive "$1"; then
        say "restarting $2 (slurm.conf changed)"
        kill "$(cat "$1")"
        for _ in $(seq 1 100); do alive "$1" || break; sleep 0.1; done
    fi
    rm -f "$1"
}
if [ "$RESTART" -eq 1 ]; then
    stop_pid "$SLURMD_PID" slurmd
    stop_pid "$CTLD_PID" slurmctld
fi
if alive "$CTLD_PID"; then
    say "slurmctld already running (pid $(cat "$CTLD_PID"))"
else
    rm -f "$CTLD_PID"
    say "starting slurmctld"
    /usr/sbin/slurmctld
    for _ in $(seq 1 100); do alive "$CTLD_PID" && break; sleep 0.1; done
    alive "$CTLD_PID" || die "slurmctld did not start (see /var/log/slurm/slurmctld.log)"
fi
if alive "$SLURMD_PID"; then
    say "slurmd already running (pid $(cat "$SLURMD_PID"))"
else
    rm -f "$SLURMD_PID"
    say "starting slurmd"
    /usr/sbin/slurmd
    for _ in $(seq 1 100); do alive "$SLURMD_PID" && break; sleep 0.1; done
    alive "$SLURMD_PID" || die "slurmd did not start (see /var/log/slurm/slurmd.log)"
fi

# 5. wait for the idle node -----------------------------------------------
state=""
for _ in $(seq 1 "$WAIT_S"); do
    state=$(sinfo -h -n "$HOST" -o '%t' 2>/dev/null | head -n1 || true)
    case "$state" in
        idle|mix|alloc) break ;;
        down*|drain*) scontrol update NodeName="$HOST" State=RESUME >/dev/null 2>&1 || true ;;
    esac
    sleep 1
done
case "$state" in
    idle|mix|alloc) ;;
    *) die "node ${HOST} is '${state:-unknown}' after ${WAIT_S} s (see /var/log/slurm/)" ;;
esac
sinfo
say "cluster up: node ${HOST} ${state}, partition main"
