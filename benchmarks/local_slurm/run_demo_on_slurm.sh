#!/usr/bin/env bash
# Reduce a simulated demo night through Snakemake's SLURM executor and compare
# with a local run of the same night.
#
#   bash benchmarks/local_slurm/start_cluster.sh          # as root, once
#   bash benchmarks/local_slurm/run_demo_on_slurm.sh [options] [VENV]
#   bash benchmarks/local_slurm/stop_cluster.sh
#
# VENV (default: .venv in the repository) is the virtualenv with the pipeline and
# snakemake, absolute or relative to the current folder; the SLURM executor plugin
# (pip extra `cluster`) is pip-installed into it when absent.
# Options:
#   --size small|full   demo night to simulate (default small; full = 4096x2048, ~80 frames)
#   --raw DIR           reduce the raw frames in DIR instead of simulating a night
#   --no-local          skip the local comparison run
#   --local-cores N     cores of the local run (default 2)
#   --keep              keep the work folder (default: removed when all went well)
#   --plan              only print the SLURM jobs the night would be (Snakemake dry run
#                       with the SLURM profile; needs no cluster) and stop
#   --worktree          run the working tree as it is (default: a clone of its committed
#                       HEAD in the work folder, so that edits made while the jobs run
#                       cannot reach them); PYTHONPATH points the jobs at the copy run
#   -- ARGS...          extra arguments for the SLURM snakemake call
# Environment: WORK_DIR parent of the work folder (default ${TMPDIR:-/tmp}; on a
# real cluster it must be on a file system the compute nodes share);
# PIPELINE_REPO the checkout to run (default: the one holding this script).
#
# Prints the wall time and the number of SLURM jobs of the cluster run, the wall
# time of the local run and their ratio; exits non-zero when a run failed or the
# manifest lists missing products.
set -euo pipefail

REPO=${PIPELINE_REPO:-$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)}
VENV=$REPO/.venv
SIZE=small
RAW_IN=""
LOCAL=1
LOCAL_CORES=2
KEEP=0
WORKTREE=0
PLAN=0
EXTRA=()
while [ $# -gt 0 ]; do
    case "$1" in
        --size) SIZE=$2; shift 2 ;;
        --raw) RAW_IN=$(cd "$2" && pwd); shift 2 ;;
        --no-local) LOCAL=0; shift ;;
        --local-cores) LOCAL_CORES=$2; shift 2 ;;
        --keep) KEEP=1; shift ;;
        --worktree) WORKTREE=1; shift ;;
        --) shift; EXTRA=("$@"); break ;;
        --plan) PLAN=1; shift ;;
        -h|--help) sed -n '2,30p' "${BASH_SOURCE[0]}"; exit 0 ;;
        -*) echo "unknown option $1 (see --help)" >&2; exit 2 ;;
        *) VENV=$1; shift ;;
    esac
done
say() { echo "[run_demo_on_slurm] $*"; }
die() { echo "[run_demo_on_slurm] ERROR: $*" >&2; exit 1; }
# The script changes directory below: make the venv path absolute first, so that a
# relative one (the README's `.venv`) means the folder relative to where it was started.
[ -d "$VENV" ] || die "no venv folder $VENV (give the virtualenv with the pipeline and snakemake)"
VENV=$(cd "$VENV" && pwd)
PY=$VENV/bin/python
SMK=$VENV/bin/snakemake

[ -x "$PY" ] || die "no python in venv $VENV"
[ -x "$SMK" ] || die "no snakemake in venv $VENV"
[ "$PLAN" -eq 1 ] || { command -v sbatch >/dev/null && sinfo -h -o '%t' 2>/dev/null | grep -Eq '^(idle|mix|alloc)'; } \
    || die "no SLURM node is up: run benchmarks/local_slurm/start_cluster.sh first (as root)"

if ! "$PY" -c 'import snakemake_executor_plugin_slurm' 2>/dev/null; then
    say "installing snakemake-executor-plugin-slurm into $VENV"
    "$PY" -m pip install -q "snakemake-executor-plugin-slurm>=2.8"  # as the extra `cluster`
fi
say "load average $(cut -d' ' -f1-3 /proc/loadavg) on $(nproc) cores"
say "snakemake $("$SMK" --version), slurm plugin $("$PY" -c 'import importlib.metadata as m; print(m.version("snakemake-executor-plugin-slurm"))'), $(sinfo -V 2>/dev/null || echo 'no SLURM commands')"

WORK=$(mktemp -d "${WORK_DIR:-${TMPDIR:-/tmp}}/slurm_demo.XXXXXX")
RAW=$WORK/raw
say "work folder $WORK"
if [ "$WORKTREE" -eq 1 ]; then
    RUN_DIR=$REPO
    say "running the working tree $REPO"
else
    RUN_DIR=$WORK/repo
    git clone -q "$REPO" "$RUN_DIR"
    say "running a clone of $REPO at $(git -C "$RUN_DIR" log -1 --format='%h %s' | cut -c1-70)"
fi
# the jobs import this copy of the pipeline, whichever checkout the venv was installed from
export PYTHONPATH="$RUN_DIR${PYTHONPATH:+:$PYTHONPATH}"
cd "$RUN_DIR"
if [ -n "$RAW_IN" ]; then
    RAW=$RAW_IN
    say "reducing $RAW: $(ls "$RAW" | wc -l) files"
else
    "$PY" -m demo_data.simulate --out "$RAW" --size "$SIZE" --quiet
    say "simulated the $SIZE demo night: $(ls "$RAW"/*.fits | wc -l) raw files"
fi

now() { date +%s.%N; }
status=0

# --- the plan only ---------------------------------------------------------
if [ "$PLAN" -eq 1 ]; then
    set +e
    "$SMK" -n --profile profiles/slurm --slurm-no-account --slurm-status-command squeue \
        "${EXTRA[@]}" --config raw_dir="$RAW" out_dir="$WORK/out_slurm" >"$WORK/plan.log" 2>&1
    rc_plan=$?
    set -e
    if [ "$rc_plan" -ne 0 ]; then
        tail -n 30 "$WORK/plan.log"; die "the dry run exited $rc_plan (log: $WORK/plan.log)"
    fi
    "$PY" - "$WORK/plan.log" Snakefile <<'EOF'
import re, sys
from collections import Counter
log, snakefile = (open(p).read() for p in sys.argv[1:3])
# The dry run lists every job: `rule NAME:` at the left margin, or a `Group job ID` header
# followed by its indented `rule NAME:` lines. The Snakefile's `localrules:` run in the main
# process, not as SLURM jobs.
block = re.search(r"^localrules:\s*\n((?:[ \t]+\w+,?[ \t]*\n)+)", snakefile, flags=re.M)
local = set(re.findall(r"\w+", block.group(1))) if block else set()
single, local_jobs, groups, current = Counter(), Counter(), {}, None
for line in log.splitlines():
    if m := re.match(r"^\[[^]]+\] Group job (\S+)", line):
        current = groups.setdefault(m.group(1), [])
    elif m := re.match(r"^rule (\w+):", line):
        current = None
        (local_jobs if m.group(1) in local else single)[m.group(1)] += 1
    elif current is not None and (m := re.match(r"^    rule (\w+):", line)):
        current.append(m.group(1))
by_rules = Counter("group " + "+".join(rules) for rules in groups.values())
print("\n=== SLURM jobs of the night (dry run) ===")
for name, n in sorted(single.items()) + sorted(by_rules.items()):
    print(f"  {n:4d}  {name}")
print(f"SLURM jobs planned: {sum(single.values()) + len(groups):8d}")
print(f"run in the main process (localrules): {', '.join(sorted(local_jobs))}")
EOF
    if [ "$KEEP" -eq 1 ]; then say "work folder kept: $WORK"; else rm -rf "$WORK"; fi
    exit 0
fi

# --- the cluster run -------------------------------------------------------
# --slurm-no-account and --slurm-status-command squeue: this test cluster has no
# accounting database (no sacctmgr accounts, sacct never sees jobs finish).
SLURM_LOG=$WORK/slurm_run.log
say "SLURM run: snakemake --profile profiles/slurm --slurm-no-account --slurm-status-command squeue ${EXTRA[*]}"
# On a one-node cluster this machine is the compute node: sample the peak resident
# memory (VmHWM) of every process of every SLURM job, to compare with what the rules ask for.
SAMPLER_PID=""
if sinfo -h -o '%N' | tr ',' '\n' | grep -qx "$(hostname)"; then
    "$PY" - "$WORK/job_peak_rss.json" <<'PYEOF' &
import json, os, signal, sys, time
peak, out = {}, sys.argv[1]
def dump(*_):
    with open(out, "w") as f:
        json.dump(peak, f)
    sys.exit(0)
signal.signal(signal.SIGTERM, dump)
while True:
    for pid in os.listdir("/proc"):
        if not pid.isdigit():
            continue
        try:
            env = open(f"/proc/{pid}/environ", "rb").read().split(b"\0")
            job = next((e[13:].decode() for e in env if e.startswith(b"SLURM_JOB_ID=")), None)
            if job is None:
                continue
            for line in open(f"/proc/{pid}/status"):
                if line.startswith("VmHWM:"):
                    peak[job] = max(peak.get(job, 0), int(line.split()[1]))
        except OSError:
            pass
    time.sleep(0.5)
PYEOF
    SAMPLER_PID=$!
fi
t0=$(now)
set +e
"$SMK" --profile profiles/slurm --slurm-no-account --slurm-status-command squeue \
    "${EXTRA[@]}" --config raw_dir="$RAW" out_dir="$WORK/out_slurm" >"$SLURM_LOG" 2>&1
rc_slurm=$?
set -e
t1=$(now)
T_SLURM=$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.2f", b - a}')
if [ -n "$SAMPLER_PID" ]; then kill "$SAMPLER_PID"; wait "$SAMPLER_PID" 2>/dev/null || true; fi
[ "$rc_slurm" -eq 0 ] || { say "SLURM run exited $rc_slurm (log: $SLURM_LOG)"; tail -n 30 "$SLURM_LOG"; status=1; }

# --- the local run ---------------------------------------------------------
T_LOCAL=""
if [ "$LOCAL" -eq 1 ]; then
    LOCAL_LOG=$WORK/local_run.log
    say "local run: snakemake --cores $LOCAL_CORES"
    t0=$(now)
    set +e
    # RUSAGE_CHILDREN of the wrapper = peak RSS of the largest single job process.
    "$PY" -c 'import resource, subprocess, sys
rc = subprocess.call(sys.argv[2:], stdout=open(sys.argv[1], "w"), stderr=subprocess.STDOUT)
open(sys.argv[1] + ".maxrss", "w").write(str(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss))
sys.exit(rc)' "$LOCAL_LOG" "$SMK" --cores "$LOCAL_CORES" --config raw_dir="$RAW" out_dir="$WORK/out_local"
    rc_local=$?
    set -e
    t1=$(now)
    T_LOCAL=$(awk -v a="$t0" -v b="$t1" 'BEGIN {printf "%.2f", b - a}')
    [ "$rc_local" -eq 0 ] || { say "local run exited $rc_local (log: $LOCAL_LOG)"; tail -n 30 "$LOCAL_LOG"; status=1; }
fi

# --- checks and figures ----------------------------------------------------
set +e
"$PY" - "$WORK" "$T_SLURM" "${T_LOCAL:-}" "$LOCAL_CORES" <<'EOF'
import re, sys
from collections import Counter
from pathlib import Path
from astropy.table import Table

work, t_slurm = Path(sys.argv[1]), float(sys.argv[2])
t_local = float(sys.argv[3]) if sys.argv[3] else None
cores = sys.argv[4]
bad = False

def manifest(name):
    path = work / name / "manifest.ecsv"
    if not path.exists():
        print(f"  {name}: no manifest.ecsv")
        return None
    tab = Table.read(path, format="ascii.ecsv")
    counts = Counter(str(s) for s in tab["status"])
    print(f"  {name}/manifest.ecsv: {len(tab)} rows, status " +
          ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
    return tab

# Jobs submitted to SLURM, by rule (or group), from the Snakemake log: the SLURM log
# folder of each submission is .snakemake/slurm_logs/rule_<name>/... or group_<name>_<rules>/...
log = (work / "slurm_run.log").read_text()
submitted = re.findall(
    r"Job \S+ has been submitted with SLURM jobid (\d+) \(log: .*?slurm_logs/(rule|group)_([^/]+)/", log)
rule_names = set(re.findall(r"^\s*(?:local)?rule (\w+):", log, flags=re.M))
local_rules = sorted(set(re.findall(r"^\s*localrule (\w+):", log, flags=re.M)))


def label(kind, name):
    """rule name, or `group` + the rules of a group job (its log folder is
    group_<group id>_<rule>_<rule>...; the group id names the frame or setup)."""
    if kind == "rule":
        return name
    rules = sorted((name.rfind(f"_{r}"), r) for r in rule_names if f"_{r}" in name)
    return "group " + "+".join(r for _, r in rules)


per_rule = Counter(label(kind, name) for _, kind, name in submitted)
slurm_ids = {s for s, _, _ in submitted}

# What SLURM itself recorded (jobcomp/filetxt of start_cluster.sh): state and run time
# (the last record of a job id wins, should the controller's state have been reset).
states, elapsed, requested_mb = Counter(), 0.0, {}
comp = Path("/var/log/slurm/jobcomp.log")
if comp.exists():
    from datetime import datetime
    records = {}
    for line in comp.read_text().splitlines():
        f = dict(kv.split("=", 1) for kv in line.split() if "=" in kv)
        if f.get("JobId") in slurm_ids:
            records[f["JobId"]] = f
    for f in records.values():
        m = re.search(r"mem=(\d+)M", f.get("Tres", ""))
        if m:
            requested_mb[f["JobId"]] = int(m.group(1))
        states[f["JobState"]] += 1
        elapsed += (datetime.fromisoformat(f["EndTime"]) -
                    datetime.fromisoformat(f["StartTime"])).total_seconds()

print("\n=== SLURM demo-night benchmark ===")
print(f"  load average at the end (1, 5, 15 min): {' '.join(Path('/proc/loadavg').read_text().split()[:3])}")
slurm_tab = manifest("out_slurm")
local_tab = manifest("out_local") if t_local is not None else None
for name, tab in (("out_slurm", slurm_tab), ("out_local", local_tab)):
    if tab is None and (name == "out_slurm" or t_local is not None):
        bad = True
    elif tab is not None and (tab["status"] == "missing").any():
        print(f"  {name}: MISSING products:")
        for row in tab[tab["status"] == "missing"]:
            print(f"    {row['path']}  {row['note']}")
        bad = True
if slurm_tab is not None and local_tab is not None:
    a, b = set(slurm_tab["path"]), set(local_tab["path"])
    print(f"  same product list in both runs: {a == b}" +
          ("" if a == b else f" (only SLURM: {sorted(a - b)[:5]}, only local: {sorted(b - a)[:5]})"))
print(f"SLURM run wall time:  {t_slurm:8.1f} s")
print(f"SLURM jobs submitted: {len(submitted):8d}  (" +
      ", ".join(f"{r} {n}" for r, n in sorted(per_rule.items())) + ")")
if local_rules:
    print(f"run in the main process (localrules): {', '.join(local_rules)}")
if states:
    print(f"SLURM job records:    {sum(states.values()):8d}  (" +
          ", ".join(f"{k} {v}" for k, v in sorted(states.items())) +
          f"); summed job run time {elapsed:.0f} s")
    if set(states) - {"COMPLETED"}:
        bad = True
peak_file = work / "job_peak_rss.json"
if peak_file.exists():
    import json
    peak_kb = json.loads(peak_file.read_text())
    rule_of = {s: label(kind, name) for s, kind, name in submitted}
    by_rule = {}
    for job, kb in peak_kb.items():
        if job in rule_of:
            r = by_rule.setdefault(rule_of[job], [0, 0])
            r[0] = max(r[0], kb / 1024)
            r[1] = max(r[1], requested_mb.get(job, 0))
    print("peak resident memory of one process per SLURM job (sampled every 0.5 s), by rule:")
    for name, (mb, req) in sorted(by_rule.items(), key=lambda kv: -kv[1][0]):
        print(f"  {name:40s} {mb:7.0f} MB of {req or '?'} MB asked")
if t_local is not None:
    maxrss = Path(work / "local_run.log.maxrss")
    rss = f", largest job peak RSS {int(maxrss.read_text()) / 1024:.0f} MB" if maxrss.exists() else ""
    print(f"local run (--cores {cores}) wall time: {t_local:8.1f} s{rss}")
    print(f"ratio SLURM / local wall time: {t_slurm / t_local:8.2f}")
sys.exit(1 if bad else 0)
EOF
rc_check=$?
set -e
[ "$rc_check" -eq 0 ] || status=1

if [ "$status" -eq 0 ] && [ "$KEEP" -eq 0 ]; then
    rm -rf "$WORK"
else
    say "work folder kept: $WORK (logs: slurm_run.log, local_run.log; SLURM job logs of failed jobs in $RUN_DIR/.snakemake/slurm_logs)"
fi
exit "$status"
