"""Faults with real processes: killed workers, killed drivers, kills while writing, checkpoints.

Every run is the real ``sweepctl`` CLI with a real LocalCluster; processes are ended
with SIGKILL by the PIDs the test started or the driver logged.
"""

from __future__ import annotations

import os
import signal
import time

import pandas as pd
import pyarrow.parquet as pq
import pytest

from tests.campaign.helpers import (
    assert_row_recomputes,
    cli,
    events,
    kill_pids,
    merged,
    start_cli,
    wait_until,
    worker_pids,
    write_recipe,
)

FAULT = {  # ~20 s of work on 2 workers: kills land mid-campaign
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.001, "max_layers": 920_000},
    "replica": {"layers": 46_000, "checkpoint_seconds": 0.3},
}


def finished(store) -> int:
    return sum(1 for e in events(store) if e.get("event") == "finished")


@pytest.fixture(scope="module")
def fault_reference(tmp_path_factory):
    d = tmp_path_factory.mktemp("fault-ref")
    recipe = write_recipe(d / "recipe.toml", FAULT)
    proc = cli("run", recipe, "--store", d / "store", "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return merged(d / "store")


@pytest.fixture
def launched():
    """Processes a test starts (drivers) or that drivers logged (workers): killed at the end."""
    procs, stores = [], []
    yield procs, stores
    for p in procs:
        if p.poll() is None:
            p.kill()
            p.wait(timeout=30)
    for s in stores:
        kill_pids(worker_pids(s))


def test_worker_killed_mid_campaign(fault_reference, tmp_path, launched):
    procs, stores = launched
    recipe = write_recipe(tmp_path / "recipe.toml", FAULT)
    store = tmp_path / "store"
    stores.append(store)
    # --flush-seconds 0: every finished replica is logged at once, so the kill lands after
    # 3 of FAULT's ~32 replicas however fast the machine
    drv = start_cli(
        *("run", recipe, store, "--workers", "2", "--flush-seconds", "0"), log=tmp_path / "log"
    )
    procs.append(drv)
    wait_until(lambda: finished(store) >= 3, 120, "three finished replicas")
    victim = worker_pids(store)[0]
    os.kill(victim, signal.SIGKILL)
    assert drv.wait(timeout=300) == 0, (tmp_path / "log").read_text()
    # work the victim held was started again elsewhere (both workers are always busy here)
    starts: dict = {}
    for e in events(store):
        if e.get("event") in ("started", "resumed"):
            k = (e["point"], e["replica"])
            starts[k] = starts.get(k, 0) + 1
    assert max(starts.values()) >= 2
    df = merged(store)
    pd.testing.assert_frame_equal(df, fault_reference, check_exact=True)
    au = cli("audit", store)
    assert au.returncode == 0, au.stdout  # no replica lost or duplicated


def test_driver_killed_then_rerun(fault_reference, tmp_path, launched):
    procs, stores = launched
    recipe = write_recipe(tmp_path / "recipe.toml", FAULT)
    store = tmp_path / "store"
    stores.append(store)
    drv = start_cli("run", recipe, store, "--workers", "2", "--flush-seconds", "0")
    procs.append(drv)
    wait_until(lambda: list((store / "replicas").glob("part-*.parquet")), 120, "a written batch")
    drv.send_signal(signal.SIGKILL)
    drv.wait(timeout=30)
    kill_pids(worker_pids(store))  # its orphaned workers
    assert not any(e.get("event") == "run-end" for e in events(store))  # killed mid-campaign
    n_before = len(list((store / "replicas").glob("part-*.parquet")))
    assert n_before >= 1
    proc = cli("run", recipe, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    pd.testing.assert_frame_equal(merged(store), fault_reference, check_exact=True)
    assert cli("audit", store).returncode == 0


def test_driver_killed_while_writing(fault_reference, tmp_path, launched):
    _procs, stores = launched
    recipe = write_recipe(tmp_path / "recipe.toml", FAULT)
    store = tmp_path / "store"
    stores.append(store)
    # The driver SIGKILLs itself after writing a batch's temporary, before os.replace.
    proc = cli(
        "run",
        recipe,
        "--store",
        store,
        "--workers",
        "2",
        env={"SWEEPCTL_FAULT": "kill-while-writing"},
    )
    assert proc.returncode == -signal.SIGKILL
    kill_pids(worker_pids(store))
    assert list((store / "replicas").glob(".*.tmp-*")), "a torn temporary should be left"
    assert not list((store / "replicas").glob("part-*.parquet"))  # readers never see it
    proc = cli("run", recipe, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    au = cli("audit", store)
    assert au.returncode == 0 and "warning" not in au.stdout, au.stdout
    pd.testing.assert_frame_equal(merged(store), fault_reference, check_exact=True)


def test_checkpointed_replica_resumes_bit_identically(tmp_path, launched):
    procs, stores = launched
    over = {
        "axes": {"widths": [8], "couplings": [0.1]},
        "precision": {"target": 0.5, "max_layers": 312_000},
        # one replica of 52 strips (≥ 51 strip values): it alone finishes the point; ~15 s on
        # an idle core, so the kill below lands long before it ends however fast the machine
        "replica": {"layers": 312_000, "strips": 52, "initial": 1, "checkpoint_seconds": 0.5},
    }
    recipe = write_recipe(tmp_path / "recipe.toml", over)
    store = tmp_path / "store"
    stores.append(store)
    drv = start_cli("run", recipe, "--store", store, "--workers", "1", log=tmp_path / "log")
    procs.append(drv)
    ck = wait_until(lambda: list((store / "checkpoints").rglob("*.ckpt")), 120, "a checkpoint")
    time.sleep(0.6)  # let it move past the first checkpoint
    drv.send_signal(signal.SIGKILL)
    drv.wait(timeout=30)
    kill_pids(worker_pids(store))
    assert ck[0].exists()
    proc = cli("run", recipe, "--store", store, "--workers", "1")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    row = pq.read_table(sorted((store / "replicas").glob("part-*.parquet"))[0]).to_pylist()[0]
    assert row["resumed_at_layer"] > 0  # it did continue from the checkpoint
    assert not list((store / "checkpoints").rglob("*.ckpt"))  # removed once stored
    assert_row_recomputes(row)  # bit-identical to an uninterrupted replica
