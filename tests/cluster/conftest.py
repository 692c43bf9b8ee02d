"""A batch system made of small shell scripts, for tests that make it fail on purpose."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

FAKE = {
    # a submission counter; prints what sbatch prints
    "sbatch": 'exec 9>"$D/lock"; flock 9\n'  # dask-jobqueue submits jobs concurrently
    'n=$(($(cat "$D/n" 2>/dev/null || echo 0) + 1)); echo $n > "$D/n"\n'
    'echo "submit $n $*" >> "$D/log"; echo "Submitted batch job $n"\n',
    "scancel": 'echo "cancel $*" >> "$D/log"\n',
    # the listing: fails, hangs, or prints $D/listing, as $D/mode says
    "squeue": 'echo "query $*" >> "$D/log"\nmode=$(cat "$D/mode")\n'
    'case $mode in fail) echo "slurm_load_jobs error: Socket timed out" >&2; exit 1;;\n'
    'hang) sleep 30;; *) cat "$D/listing";; esac\n',
}


@pytest.fixture
def fake_slurm(tmp_path, monkeypatch):
    d = tmp_path / "batch"
    b = d / "bin"
    b.mkdir(parents=True)
    for name, body in FAKE.items():
        p = b / name
        p.write_text(f"#!/bin/bash\nD={d}\n{body}")
        p.chmod(0o755)
    (d / "mode").write_text("list")
    (d / "listing").write_text("")
    monkeypatch.setenv("PATH", f"{b}:{os.environ['PATH']}")
    return d


def log_lines(d: Path, word: str) -> list[str]:
    f = d / "log"
    return [ln for ln in f.read_text().splitlines() if ln.startswith(word)] if f.exists() else []
