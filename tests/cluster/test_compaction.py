"""Compaction of part files and removal of orphaned checkpoints, under SIGKILL.

Stores come from real runs; the faults are the store's own SWEEPCTL_FAULT hooks, which
SIGKILL the process at one step of the compaction (or of a flush).
"""

from __future__ import annotations

import shutil
import signal

import pandas as pd
import pyarrow as pa
import pytest

from sweepctl.campaign.store import Store
from tests.campaign.helpers import cli, events, kill_pids, merged, worker_pids, write_recipe
from tests.campaign.test_faults import FAULT


def rows(store) -> pa.Table:
    """Every stored row as the one reader returns it, in (point, replica) order."""
    t = Store(store).read_replicas()
    return t.sort_by([("point_key", "ascending"), ("replica", "ascending")])


@pytest.fixture(scope="module")
def many_parts(tmp_path_factory):
    """A finished store of at least three part files, grown by three runs that each
    add a width (each run writes its own part files), and a copy of it after two."""
    d = tmp_path_factory.mktemp("compact")
    store = d / "store"
    for widths in ([2], [2, 3], [2, 3, 4]):
        recipe = write_recipe(d / "recipe.toml", {**FAULT, "axes": {"widths": widths}})
        if widths == [2, 3, 4]:
            shutil.copytree(store, d / "partial")
        proc = cli("run", recipe, "--store", store, "--workers", "2", "--compact-at", "1000")
        kill_pids(worker_pids(store))
        assert proc.returncode == 0, proc.stdout + proc.stderr
    assert len(Store(store).part_files()) >= 3
    return store, recipe


@pytest.mark.parametrize(
    "fault", ["kill-compact-written", "kill-compact-replaced", "kill-compact-deleting"]
)
def test_compaction_killed_at_each_step_loses_and_changes_nothing(many_parts, tmp_path, fault):
    src, _ = many_parts
    store = tmp_path / "store"
    shutil.copytree(src, store)
    before, table_before = len(Store(store).part_files()), rows(store)
    proc = cli("compact", store, env={"SWEEPCTL_FAULT": fault})
    assert proc.returncode == -signal.SIGKILL
    # whatever step it died at, every reader sees the same rows, bit for bit
    assert rows(store).equals(table_before)
    assert cli("audit", store).returncode == 0
    proc = cli("compact", store)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    parts = Store(store).part_files()
    assert len(parts) == 1 < before, proc.stdout
    assert rows(store).equals(table_before)
    assert not list((store / "replicas").glob(".*.tmp-*"))
    au = cli("audit", store)
    assert au.returncode == 0 and "duplicate" not in au.stdout.lower(), au.stdout


def test_driver_compacts_past_the_threshold(many_parts, tmp_path):
    src, recipe = many_parts
    store = tmp_path / "store"
    shutil.copytree(src.parent / "partial", store)  # two widths done, in >= 2 part files
    assert len(Store(store).part_files()) >= 2
    proc = cli("run", recipe, "--store", store, "--workers", "2", "--compact-at", "2")
    kill_pids(worker_pids(store))
    assert proc.returncode == 0, proc.stdout + proc.stderr
    start = [e for e in events(store) if e.get("event") == "run-start"][-1]
    assert start["compacted"]["files_read"] >= 2  # at start: past the threshold already
    assert len(Store(store).small_part_files()) < 2 + 1  # never more than the threshold
    pd.testing.assert_frame_equal(merged(store), merged(src), check_exact=True)


def test_checkpoints_orphaned_by_a_kill_after_the_rows_are_removed(tmp_path):
    # a checkpoint every 10 ms: even the shortest replica on a fast machine leaves one
    replica = {**FAULT["replica"], "checkpoint_seconds": 0.01}
    recipe = write_recipe(tmp_path / "recipe.toml", {**FAULT, "replica": replica})
    store = tmp_path / "store"
    # SIGKILL right after the first batch of rows is stored, before its checkpoints go
    proc = cli(
        "run", recipe, "--store", store, "--workers", "2", env={"SWEEPCTL_FAULT": "kill-after-rows"}
    )
    kill_pids(worker_pids(store))
    assert proc.returncode == -signal.SIGKILL
    st = Store(store)
    t = st.read_replicas(columns=["point_key", "replica"])
    from sweepctl.campaign.recipe import load_recipe

    short = {p.key: p.short for p in load_recipe(recipe).points()}
    stored = {
        st.checkpoint_path(short[k], r)
        for k, r in zip(
            t.column("point_key").to_pylist(), t.column("replica").to_pylist(), strict=True
        )
    }
    orphans = [p for p in stored if p.exists()]
    assert orphans, "the kill should leave checkpoints of stored replicas"
    others = [p for p in (store / "checkpoints").rglob("*.ckpt") if p not in stored]
    proc = cli("compact", store)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert f"{len(orphans)} checkpoints of stored replicas removed" in proc.stdout
    assert not any(p.exists() for p in stored)
    assert all(p.exists() for p in others)  # in-flight replicas keep theirs
