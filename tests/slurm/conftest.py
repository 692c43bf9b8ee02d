"""The batch-system tier: a real Slurm, or a clear skip (an error if CI requires Slurm)."""

from __future__ import annotations

import os
import shutil
import subprocess

import pytest


def _slurm_answers() -> bool:
    if shutil.which("sbatch") is None or shutil.which("sinfo") is None:
        return False
    try:
        return subprocess.run(["sinfo", "-h"], capture_output=True, timeout=15).returncode == 0
    except (OSError, subprocess.SubprocessError):
        return False


HAVE_SLURM = _slurm_answers()


def pytest_collection_modifyitems(config, items):
    here = os.path.dirname(__file__)
    mine = [it for it in items if str(it.fspath).startswith(here)]
    if HAVE_SLURM or not mine:
        return
    if os.environ.get("SWEEPCTL_REQUIRE_SLURM"):
        raise pytest.UsageError(
            "SWEEPCTL_REQUIRE_SLURM is set but no working Slurm answers (sinfo failed); "
            "start one with .ci/slurm-up.sh"
        )
    skip = pytest.mark.skip(
        reason="no Slurm answers here (sbatch/sinfo); start one with .ci/slurm-up.sh"
    )
    for it in mine:
        it.add_marker(skip)
