"""Every command that writes a file: a path the system refuses is one line, exit 2, no
traceback, and nothing already stored changes."""

from __future__ import annotations

import shutil

import pytest

from tests.campaign.helpers import cli, snapshot, write_recipe


@pytest.mark.parametrize("command", ["run", "merge", "bench", "new"])
def test_a_path_through_a_file_is_one_line(command, reference_store, tmp_path):
    # a path through a regular file cannot be created, even by root (permissions can)
    blocker = tmp_path / "a-file"
    blocker.write_text("")
    bad = blocker / "out"
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    snap = snapshot(store)
    args = {
        "run": ("run", write_recipe(tmp_path / "r.toml"), bad),
        "merge": ("merge", store, "--out", bad),
        "bench": ("bench", "--widths", "4", "--seconds", "0.05", "--out", bad),
        "new": ("new", bad),
    }[command]
    proc = cli(*args)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    err = proc.stderr.strip()
    assert "Traceback" not in proc.stdout + proc.stderr
    assert len(err.splitlines()) == 1 and err.startswith("error:"), err
    assert "a-file" in err and ("Not a directory" in err or "cannot write" in err), err
    assert snapshot(store) == snap  # nothing stored was touched
