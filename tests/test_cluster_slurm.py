"""The demo night on a real one-node SLURM cluster, through Snakemake's SLURM executor.

Truth from outside the pipeline:
* SLURM's own records: the controller's job-completion log (``JobCompLoc`` of
  benchmarks/local_slurm/start_cluster.sh) and ``squeue``;
* the local run (``snakemake --cores 2``, fixture reduced_night of conftest.py, which
  tests/test_workflow.py checks) of the same simulated night: the steps are
  deterministic, so every FITS data array, ECSV column and PNG figure must be bit-identical
  (headers differ only in DATE and CHECKSUM, the time of writing; ECSV metadata only in
  wall-clock timings); logs and the HTML report hold times and are not compared;
* the simulator (demo_data, which never imports pipeline) for what the night holds.

Needs root (the cluster is started with benchmarks/local_slurm/start_cluster.sh when it is
not up: apt-get slurm-wlm munge, munged, slurmctld, slurmd) and the SLURM executor plugin
(``pip install -e ".[cluster]"``); skipped, with the reason, where either is missing or the
daemons do not come up. `bash .ci/run` installs and starts both.
"""

import json
import os
import re
import shutil
import subprocess
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from conftest import REPO_ROOT, SNAKEMAKE

pytestmark = pytest.mark.slow

CLUSTER_DIR = REPO_ROOT / "benchmarks" / "local_slurm"
JOBCOMP_LOG = Path("/var/log/slurm/jobcomp.log")  # JobCompLoc in start_cluster.sh
# The test cluster has no accounting database (see DEVELOPERS.md, "Cluster jobs").
SLURM_ARGS = ["--profile", "profiles/slurm", "--slurm-no-account",
              "--slurm-status-command", "squeue"]
# Header keywords that hold the time a file was written (FITS standard DATE; the checksums
# cover the header, so they change with it).
VOLATILE_KEYWORDS = {"DATE", "CHECKSUM"}


def _node_up():
    sinfo = shutil.which("sinfo")
    if sinfo is None:
        return False
    result = subprocess.run([sinfo, "-h", "-o", "%t"], capture_output=True, text=True)
    return result.returncode == 0 and bool(re.search(r"^(idle|mix|alloc)", result.stdout, re.M))


@pytest.fixture(scope="module")
def cluster():
    """A running one-node SLURM cluster (started here if it is not up, stopped again after)."""
    try:
        import snakemake_executor_plugin_slurm  # noqa: F401
    except ImportError:
        pytest.skip('the SLURM executor plugin is not installed: pip install -e ".[cluster]"')
    started = False
    if not _node_up():
        if os.geteuid() != 0:
            pytest.skip("no SLURM node is up, and starting the one-node test cluster "
                        "(benchmarks/local_slurm/start_cluster.sh) needs root")
        if shutil.which("slurmctld") is None and shutil.which("apt-get") is None:
            pytest.skip("no SLURM installed and no apt-get to install slurm-wlm and munge")
        start = subprocess.run(["bash", str(CLUSTER_DIR / "start_cluster.sh")],
                               capture_output=True, text=True)
        if start.returncode != 0 or not _node_up():
            pytest.skip("the one-node SLURM cluster did not start (start_cluster.sh exited "
                        f"{start.returncode}): {(start.stdout + start.stderr)[-600:]}")
        started = True
    yield
    if started:
        subprocess.run(["bash", str(CLUSTER_DIR / "stop_cluster.sh")], capture_output=True)


@pytest.fixture(scope="module")
def night(reduced_night, tmp_path_factory):
    """The small demo night, its local reduction (shared with tests/test_workflow.py, see
    conftest.py) and a folder for the SLURM runs."""
    base = tmp_path_factory.mktemp("cluster_night")
    return dict(base=base, raw=reduced_night["raw"], local=reduced_night["out"],
                slurm=base / "out_slurm")


def _submissions(log):
    """{SLURM job id: log folder name} of every job Snakemake submitted, in order: the folder
    is rule_<rule> or group_<group id>_<rules> below .snakemake/slurm_logs/."""
    return dict(re.findall(r"has been submitted with SLURM jobid (\d+) \(log: .*?slurm_logs/"
                           r"((?:rule|group)_[^/]+)/", log))


def _jobcomp_records(run_id):
    """SLURM's completion record of each job of a run (job name = the plugin's run id)."""
    records = {}
    if JOBCOMP_LOG.exists():
        for line in JOBCOMP_LOG.read_text().splitlines():
            fields = dict(kv.split("=", 1) for kv in line.split() if "=" in kv)
            if fields.get("Name") == run_id:
                records[fields["JobId"]] = fields
    return records


def _run_id(log):
    match = re.search(r"SLURM run ID: (\S+)", log)
    assert match, "the SLURM executor printed no run ID"
    return match.group(1)


def _squeue_state(job_id):
    result = subprocess.run(["squeue", "-h", "-j", job_id, "-o", "%T"], capture_output=True,
                            text=True)
    return result.stdout.strip()


def _cancel_first_science_chain(log_path, stop, found):
    """Watch the Snakemake log; scancel the first science frame's job once SLURM runs it."""
    while not stop.is_set():
        text = log_path.read_text() if log_path.exists() else ""
        chains = [(job, folder) for job, folder in _submissions(text).items()
                  if folder.startswith("group_frame_") and folder.endswith("_flux_calibrate")]
        if chains:
            job, folder = chains[0]
            if _squeue_state(job) == "RUNNING":
                time.sleep(3)  # well inside the job: Snakemake runs its first step
                subprocess.run(["scancel", job], check=True)
                found.update(job=job, folder=folder,
                             frame=re.match(r"group_frame_(.+?)_calibrate_frame", folder)[1])
                return
        time.sleep(0.5)


@pytest.fixture(scope="module")
def slurm_night(cluster, night):
    """The night through SLURM twice: a first run in which one science frame's job is
    cancelled with scancel while it runs, then the same command again."""
    command = [*SNAKEMAKE, *SLURM_ARGS, "--config", f"raw_dir={night['raw']}",
               f"out_dir={night['slurm']}"]
    first_log = night["base"] / "slurm_first.log"
    stop, cancelled = threading.Event(), {}
    watcher = threading.Thread(target=_cancel_first_science_chain,
                               args=(first_log, stop, cancelled), daemon=True)
    watcher.start()
    start = time.perf_counter()
    with open(first_log, "w") as log:
        first = subprocess.run(command, cwd=REPO_ROOT, stdout=log, stderr=subprocess.STDOUT)
    first_s = time.perf_counter() - start
    stop.set()
    watcher.join()
    first_text = first_log.read_text()
    manifest_after_first = Table.read(night["slurm"] / "manifest.ecsv", format="ascii.ecsv")
    report_after_first = (night["slurm"] / "night_report.html").read_text()
    start = time.perf_counter()
    second = subprocess.run(command, cwd=REPO_ROOT, capture_output=True, text=True)
    second_s = time.perf_counter() - start
    second_text = second.stdout + second.stderr
    print(f"SLURM runs: first {first_s:.0f} s ({len(_submissions(first_text))} jobs, one "
          f"cancelled), second {second_s:.0f} s ({len(_submissions(second_text))} jobs)")
    return dict(first_rc=first.returncode, first=first_text, cancelled=cancelled,
                manifest_after_first=manifest_after_first, report_after_first=report_after_first,
                second_rc=second.returncode, second=second_text)


def _usable_frames(raw):
    """{kind: [frame ids]} of the frames the simulator expects the pipeline to use
    (raw/truth/index.json: kind, setup, expected_pipeline_status)."""
    frames = json.loads((raw / "truth" / "index.json").read_text())["frames"]
    usable = {}
    for frame_id, truth in frames.items():
        if truth["expected_pipeline_status"] == "ok":
            usable.setdefault(truth["kind"], []).append((frame_id, truth.get("setup")))
    return usable


def test_one_cluster_job_per_frame_chain(slurm_night, night):
    # Every frame's chain is one SLURM job: arcs (calibrate, find lines, solve), standards
    # (calibrate, extract), science frames (calibrate, extract, flux-calibrate); plus the
    # master bias, and per setup one master flat and one job for the sensitivity and the
    # standards' flux calibration. Counts from the simulator's truth of the night.
    usable = _usable_frames(night["raw"])
    setups = {setup for _, setup in usable["science"] + usable["standard"]}
    jobs = Counter(re.sub(r"^group_(frame|sensitivity)_.*?_(?=calibrate_frame|fit_sensitivity)",
                          r"group_\1_", folder)
                   for folder in _submissions(slurm_night["first"]).values())
    assert jobs == {
        "rule_master_bias": 1,  # one readout mode
        "rule_master_flat": len(setups),
        "group_frame_calibrate_frame_find_arc_lines_solve_wavelength": len(usable["arc"]),
        "group_frame_calibrate_frame_extract_spectra": len(usable["standard"]),
        "group_frame_calibrate_frame_extract_spectra_flux_calibrate": len(usable["science"]),
        "group_sensitivity_fit_sensitivity_flux_calibrate": len(setups),
    }, jobs
    # (the 28-file demo night: 18 SLURM jobs; 44 before the rules were grouped)


def test_cancelled_job_is_reported_with_its_rule_and_frame(slurm_night, night):
    cancelled = slurm_night["cancelled"]
    assert cancelled, "no science frame's job was seen running to cancel"
    frame, log = cancelled["frame"], slurm_night["first"]
    assert slurm_night["first_rc"] != 0
    # Snakemake names the frame's group, its rules and their logs, and the SLURM job's log,
    # in which SLURM says it cancelled the job. (For a group job Snakemake 9.27.1 drops the
    # executor's own message, "SLURM status is: 'CANCELLED'"; SLURM's record is checked in
    # test_slurm_recorded_every_job.)
    error = log[log.index(f"Error in group frame_{frame}"):]
    error = error[:error.index("Finished jobid")] if "Finished jobid" in error else error
    for rule in ("calibrate_frame", "extract_spectra", "flux_calibrate"):
        assert f"rule {rule}:" in error
        assert f"logs/{rule}/{frame}.log" in error
    slurm_log = re.search(r"log: (\S+/slurm_logs/\S+\.log) \(check log file", error)
    assert slurm_log, error[:2000]
    assert f"JOB {cancelled['job']} ON " in Path(slurm_log.group(1)).read_text()
    assert "CANCELLED" in Path(slurm_log.group(1)).read_text()
    # the manifest written by the onerror handler lists the frame's products as missing, and
    # nothing else but the night's combined spectra, which need every frame
    manifest = slurm_night["manifest_after_first"]
    missing = [str(p) for p in manifest["path"][manifest["status"] == "missing"]]
    assert missing and all(frame in path or path == "combined" for path in missing), missing
    assert f"spectra_fluxed/{frame}" in missing
    assert "incomplete" in slurm_night["report_after_first"]


def test_rerun_of_the_same_command_completes_the_night(slurm_night):
    assert slurm_night["second_rc"] == 0, slurm_night["second"][-4000:]
    # only the cancelled frame's job is submitted again (all its steps, or those whose
    # products the cancelled job had not finished)
    again = list(_submissions(slurm_night["second"]).values())
    frame = slurm_night["cancelled"]["frame"]
    assert len(again) == 1 and again[0].startswith(f"group_frame_{frame}_"), again
    assert again[0].endswith("_flux_calibrate"), again


def test_slurm_recorded_every_job(slurm_night):
    # SLURM's own completion records of both runs: one per submitted job, all COMPLETED but
    # the one cancelled.
    for log, expected_cancelled in ((slurm_night["first"], {slurm_night["cancelled"]["job"]}),
                                    (slurm_night["second"], set())):
        submitted = _submissions(log)
        deadline = time.monotonic() + 30
        while True:
            records = _jobcomp_records(_run_id(log))
            if set(records) >= set(submitted) or time.monotonic() > deadline:
                break
            time.sleep(1)  # the controller writes a record when the job's end is processed
        assert set(records) == set(submitted)
        states = {job: rec["JobState"] for job, rec in records.items()}
        assert {job for job, state in states.items() if state == "CANCELLED"} == expected_cancelled
        assert {state for job, state in states.items() if job not in expected_cancelled} == {
            "COMPLETED"}
        assert all(rec["NodeList"] for rec in records.values())


def _normalised(value, out_dir):
    """``value`` with the output folder replaced and NaN made comparable, also inside
    mappings and lists (ECSV metadata)."""
    if isinstance(value, str):
        return value.replace(str(out_dir), "<out_dir>")
    if isinstance(value, float) and np.isnan(value):
        return "nan"
    if isinstance(value, dict):
        return {k: _normalised(v, out_dir) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_normalised(v, out_dir) for v in value]
    return value


def _compare_fits(a, b, root_a, root_b):
    with fits.open(a) as ha, fits.open(b) as hb:
        assert [h.name for h in ha] == [h.name for h in hb], a
        for x, y in zip(ha, hb):
            if x.data is None or y.data is None:
                assert x.data is None and y.data is None, (a, x.name)
            elif x.data.dtype.names is None:
                assert np.array_equal(x.data, y.data, equal_nan=True), (a, x.name)
            else:
                for name in x.data.dtype.names:
                    assert np.array_equal(x.data[name], y.data[name],
                                          equal_nan=x.data[name].dtype.kind == "f"), (a, name)
            keys = [k for k in x.header if k not in VOLATILE_KEYWORDS]
            assert keys == [k for k in y.header if k not in VOLATILE_KEYWORDS], (a, x.name)
            for key in set(keys) - {"COMMENT", "HISTORY", ""}:
                assert (_normalised(x.header[key], root_a)
                        == _normalised(y.header[key], root_b)), (a, x.name, key)


def _compare_ecsv(a, b, root_a, root_b):
    ta, tb = Table.read(a, format="ascii.ecsv"), Table.read(b, format="ascii.ecsv")
    assert ta.colnames == tb.colnames, a
    for name in ta.colnames:
        assert ([_normalised(v, root_a) for v in ta[name].tolist()]
                == [_normalised(v, root_b) for v in tb[name].tolist()]), (a, name)
    # wall-clock timings (e.g. solve_time_s) are the only metadata that may differ
    timing = {k for k in set(ta.meta) | set(tb.meta) if str(k).endswith("_time_s")}
    assert ({k: _normalised(v, root_a) for k, v in ta.meta.items() if k not in timing}
            == {k: _normalised(v, root_b) for k, v in tb.meta.items() if k not in timing}), a


def test_products_are_identical_to_the_local_run(slurm_night, night):
    local, slurm = night["local"], night["slurm"]
    manifest_local = Table.read(local / "manifest.ecsv", format="ascii.ecsv")
    manifest_slurm = Table.read(slurm / "manifest.ecsv", format="ascii.ecsv")
    # The first SLURM run failed, so its onerror handler wrote night_report.html before the
    # rerun's manifest was made, and that manifest lists it; a clean run makes the report
    # after the manifest. Every other row must be the same.
    rerun_only = manifest_slurm["path"] == "night_report.html"
    assert rerun_only.sum() <= 1
    manifest_slurm = manifest_slurm[~rerun_only]
    assert manifest_slurm.colnames == manifest_local.colnames
    for name in manifest_local.colnames:  # path first: the same products in the same order
        assert ([_normalised(v, slurm) for v in manifest_slurm[name].tolist()]
                == [_normalised(v, local) for v in manifest_local[name].tolist()]), name
    assert "missing" not in set(manifest_slurm["status"])

    def files(root):
        return sorted(p.relative_to(root) for p in root.rglob("*")
                      if p.is_file() and p.parts[len(root.parts)] != "logs"
                      and p.suffix != ".html" and p.name != "manifest.ecsv")

    assert files(slurm) == files(local)
    kinds = Counter()
    for rel in files(local):
        a, b = local / rel, slurm / rel
        if rel.suffix == ".fits":
            _compare_fits(a, b, local, slurm)
        elif rel.suffix == ".ecsv":
            _compare_ecsv(a, b, local, slurm)
        else:
            assert a.read_bytes() == b.read_bytes(), rel
        kinds[rel.suffix] += 1
    assert kinds[".fits"] > 30 and kinds[".png"] > 10 and kinds[".ecsv"] > 10, kinds


def test_benchmark_plans_the_night_with_a_relative_venv_path(tmp_path, reduced_night):
    # The README's `run_demo_on_slurm.sh .venv`: the venv path is relative to where the script
    # is started, and the script changes directory before it runs Python (it used to fail
    # there with ".venv/bin/python: No such file or directory"). --plan needs no cluster.
    try:
        import snakemake_executor_plugin_slurm  # noqa: F401
    except ImportError:
        pytest.skip('the SLURM executor plugin is not installed: pip install -e ".[cluster]"')
    venv = os.path.relpath(sys.prefix, tmp_path)  # this venv, seen from the folder started in
    assert not os.path.isabs(venv) and (tmp_path / venv / "bin" / "python").exists()
    result = subprocess.run(["bash", str(CLUSTER_DIR / "run_demo_on_slurm.sh"), "--plan",
                             "--worktree", "--raw", str(reduced_night["raw"]), venv],
                            cwd=tmp_path, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    # one job per usable arc, standard and science frame, per setup a flat and a sensitivity
    # job, one master bias (counts from the simulator's truth)
    usable = _usable_frames(reduced_night["raw"])
    setups = {setup for _, setup in usable["science"] + usable["standard"]}
    expected = 1 + 2 * len(setups) + len(usable["arc"]) + len(usable["standard"]) + len(
        usable["science"])
    assert re.search(rf"^SLURM jobs planned:\s+{expected}$", result.stdout, flags=re.M), (
        expected, result.stdout)
    assert "group calibrate_frame+extract_spectra+flux_calibrate" in result.stdout
