"""The batch-system tier: a real Slurm, or a clear skip (never a skip in CI)."""

from __future__ import annotations

import os
import shutil
import subprocess

import pytest

HAVE_SLURM = (
    shutil.which("sbatch") is not None
    and subprocess.run(["sinfo", "-h"], capture_output=True, timeout=10).returncode == 0
    if shutil.which("sinfo")
    else False
)


def pytest_collection_modifyitems(config, items):
    if HAVE_SLURM:
        return
    here = os.path.dirname(__file__)
    mine = [it for it in items if str(it.fspath).startswith(here)]
    if os.environ.get("SWEEPCTL_REQUIRE_SLURM"):
        raise pytest.UsageError(
            "SWEEPCTL_REQUIRE_SLURM is set but no working Slurm answers (sinfo failed); "
            "start one with .ci/slurm-up.sh"
        )
    skip = pytest.mark.skip(
        reason="no Slurm here (no sbatch/sinfo); start one with .ci/slurm-up.sh"
    )
    for it in mine:
        it.add_marker(skip)
