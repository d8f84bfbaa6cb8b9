"""Shared test fixtures.

Published reference data (line lists, grating checks, refraction pairs,
extinction) are copied, with their sources, into tests/reference/ from the
project's shared reference folder; see tests/reference/README.md for every
source key.
"""

from pathlib import Path

import numpy as np
import pytest

REPO_ROOT = Path(__file__).resolve().parents[1]
REFERENCE_DIR = REPO_ROOT / "tests" / "reference"


@pytest.fixture(scope="session")
def reference_dir():
    """Folder of published reference tables (tests/reference)."""
    return REFERENCE_DIR


@pytest.fixture
def rng():
    """A fixed-state random generator, so failures reproduce."""
    return np.random.default_rng(20261201)
