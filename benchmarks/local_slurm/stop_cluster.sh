#!/usr/bin/env bash
# Stop the one-node SLURM cluster started by start_cluster.sh: slurmd,
# slurmctld, then munged, each by its pid file (nothing else is killed).
# Idempotent: daemons that are not running are skipped.
set -euo pipefail

say() { echo "[stop_cluster] $*"; }
[ "$(id -u)" -eq 0 ] || { echo "[stop_cluster] ERROR: run as root" >&2; exit 1; }

stop_pid() {  # stop_pid PIDFILE NAME
    local pidfile=$1 name=$2 pid
    if [ -s "$pidfile" ] && pid=$(cat "$pidfile") && kill -0 "$pid" 2>/dev/null; then
        say "stopping $name (pid $pid)"
        kill "$pid"
        for _ in $(seq 1 100); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
        if kill -0 "$pid" 2>/dev/null; then
            say "$name still running after 10 s, sending SIGKILL"
            kill -9 "$pid" 2>/dev/null || true
        fi
    else
        say "$name not running"
    fi
    rm -f "$pidfile"
}

stop_pid /run/slurmd.pid slurmd
stop_pid /run/slurmctld.pid slurmctld
stop_pid /run/munge/munged.pid munged
say "done"
