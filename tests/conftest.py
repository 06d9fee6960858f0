"""Shared test fixtures and helpers.

Tests that need a system tool (chromium, the BIDS validator, Slurm) call
:func:`require_tool`.  Locally a missing tool skips the test with the reason;
in CI (``EPICORR_REQUIRE_TOOLS=1``, set by ``.ci/run``) it fails instead, so
CI always runs them.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest

os.environ.setdefault("NIPYPE_NO_ET", "1")

REPO = Path(__file__).resolve().parents[1]
ARTIFACTS = REPO / "tests" / "artifacts"


def require_tool(path_or_name: str, *, why: str) -> str:
    """Return the tool's path, or skip (locally) / fail (CI) with a clear reason."""
    found = shutil.which(path_or_name) or (path_or_name if Path(path_or_name).exists() else None)
    if found:
        return found
    message = f"{path_or_name} not available: {why}"
    if os.environ.get("EPICORR_REQUIRE_TOOLS") == "1":
        pytest.fail(message + " (CI requires it; see .ci/run)")
    pytest.skip(message)


@pytest.fixture
def rng():
    """A seeded generator: tests are deterministic."""
    return np.random.default_rng(20261201)


@pytest.fixture
def artifacts_dir() -> Path:
    """Folder for test artifacts (screenshots), kept after the run."""
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    return ARTIFACTS
