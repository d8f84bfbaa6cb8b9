"""Shared test fixtures.

Published reference data (line lists, grating checks, refraction pairs,
extinction) are copied, with their sources, into tests/reference/ from the
project's shared reference folder; see tests/reference/README.md for every
source key.
"""

import hashlib
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

REPO_ROOT = Path(__file__).resolve().parents[1]
REFERENCE_DIR = REPO_ROOT / "tests" / "reference"
SNAKEMAKE = [sys.executable, "-m", "snakemake"]


def run_snakemake(*args, check=True):
    """The real `snakemake` command in the repository root; raises with its output if it fails."""
    result = subprocess.run([*SNAKEMAKE, *args], cwd=REPO_ROOT, capture_output=True, text=True)
    if check and result.returncode != 0:
        raise AssertionError(f"snakemake {' '.join(args)} failed:\n{result.stdout[-4000:]}\n"
                             f"{result.stderr[-8000:]}")
    return result


def file_digests(folder):
    """SHA-256 of every file directly in ``folder``, by name."""
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir())
            if p.is_file()}


@pytest.fixture(scope="session")
def reduced_night(tmp_path_factory):
    """The small demo night (simulator defaults) reduced with `snakemake --cores 2`, once per
    session: tests/test_workflow.py checks this run, tests/test_cluster_slurm.py compares a
    SLURM run of the same raw folder with it. Tests only read its folders."""
    base = tmp_path_factory.mktemp("night")
    raw, out = base / "raw", base / "out"
    subprocess.run([sys.executable, "-m", "demo_data.simulate", "--out", str(raw)], check=True,
                   cwd=REPO_ROOT, capture_output=True)
    before = file_digests(raw)
    config = [f"raw_dir={raw}", f"out_dir={out}"]
    start = time.perf_counter()
    run = run_snakemake("--cores", "2", "--config", *config)
    elapsed = time.perf_counter() - start
    return dict(raw=raw, out=out, before=before, config=config, run=run, elapsed=elapsed)


@pytest.fixture(scope="session")
def reference_dir():
    """Folder of published reference tables (tests/reference)."""
    return REFERENCE_DIR


@pytest.fixture
def rng():
    """A fixed-state random generator, so failures reproduce."""
    return np.random.default_rng(20261201)
