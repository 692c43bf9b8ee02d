"""Audit catches tampering; Ctrl-C loses nothing; an existing Dask cluster is used."""

from __future__ import annotations

import shutil
import signal

import pandas as pd
import pyarrow.parquet as pq

from sweepctl.campaign.plan import CostModel, freeze
from sweepctl.campaign.recipe import parse_recipe
from sweepctl.campaign.store import Store
from tests.campaign.helpers import (
    cli,
    dask_cluster,
    events,
    kill_pids,
    merged,
    start_cli,
    wait_until,
    worker_pids,
    write_recipe,
)
from tests.campaign.test_faults import FAULT


def test_audit_detects_a_changed_number(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    part = sorted((store / "replicas").glob("part-*.parquet"))[0]
    t = pq.read_table(part)
    rows = t.to_pylist()
    rows[0]["gamma_strips"] = [
        g * (1 + 1e-15) if i == 0 else g for i, g in enumerate(rows[0]["gamma_strips"])
    ]
    import pyarrow as pa

    pq.write_table(pa.Table.from_pylist(rows, schema=t.schema), part)
    proc = cli("audit", store, "--recompute", "100")  # every replica
    assert proc.returncode == 1
    assert proc.stdout.count("MISMATCH") == 1 and "audit FAILED" in proc.stdout


def test_audit_detects_a_foreign_schema(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    import pyarrow as pa

    pq.write_table(pa.table({"x": [1.0]}), store / "replicas" / "part-zz-foreign.parquet")
    proc = cli("audit", store)
    assert proc.returncode == 1 and "schema differs" in proc.stdout
    # every other command refuses it in one line
    proc = cli("merge", store)
    assert proc.returncode == 2 and "part-zz-foreign.parquet" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_ctrl_c_stops_cleanly_and_the_rerun_completes(tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", FAULT)
    ref = tmp_path / "ref"
    assert cli("run", recipe, "--store", ref, "--workers", "2").returncode == 0
    store = tmp_path / "store"
    # --flush-seconds 0: finished replicas are logged at once, so SIGINT lands early
    drv = start_cli(
        *("run", recipe, store, "--workers", "2", "--flush-seconds", "0"), log=tmp_path / "log"
    )
    try:
        wait_until(
            lambda: sum(e.get("event") == "finished" for e in events(store)) >= 3,
            120,
            "three finished replicas",
        )
        drv.send_signal(signal.SIGINT)
        assert drv.wait(timeout=120) == 130
    finally:
        if drv.poll() is None:
            drv.kill()
        kill_pids(worker_pids(store))
    log = (tmp_path / "log").read_text()
    assert "interrupted" in log and "Traceback" not in log
    assert events(store)[-1]["event"] == "interrupted"
    n = events(store)[-1]["computed"]
    stored = sum(pq.read_table(p).num_rows for p in (store / "replicas").glob("part-*.parquet"))
    assert stored == n >= 3  # everything that arrived was written
    lease = Store(store).lease_state()
    assert lease is not None and lease.released  # a clean stop releases the lease at once
    assert cli("run", recipe, "--store", store, "--workers", "2").returncode == 0
    pd.testing.assert_frame_equal(merged(store), merged(ref), check_exact=True)


def test_existing_cluster_through_a_scheduler_file(reference_store, tmp_path):
    sched_file = tmp_path / "scheduler.json"
    with dask_cluster(sched_file):
        recipe = write_recipe(tmp_path / "recipe.toml")
        proc = cli("run", recipe, "--store", tmp_path / "store", "--scheduler-file", sched_file)
        assert proc.returncode == 0, proc.stdout + proc.stderr
        assert "scheduler-file" in proc.stdout
    pd.testing.assert_frame_equal(
        merged(tmp_path / "store"), merged(reference_store), check_exact=True
    )


def _calibration(rows):
    return CostModel(
        [
            {"width": n, "column_seconds": c, "column_seconds_disorder": cd, "qr_seconds": q}
            for n, c, cd, q in rows
        ]
    )


def test_duration_is_frozen_into_layers_once():
    data = {
        "campaign": {"name": "d"},
        "axes": {"widths": [4, 8], "couplings": [0.0], "disorder": [{"p": 0.0}, {"p": 0.1}]},
        "precision": {"target": 0.01, "max_cpu_hours": 0.5},
        "replica": {"duration_seconds": 10.0, "warmup": 40, "strips": 8},
    }
    rec = parse_recipe(data)
    fast = _calibration([(4, 1e-6, 1.5e-6, 8e-6), (8, 2e-6, 3e-6, 16e-6)])
    fz = freeze(rec, fast)
    clean4, clean8, dis4 = (
        "N=4|pb=0.0|po=0.0|eps=1e-06",
        "N=8|pb=0.0|po=0.0|eps=1e-06",
        "N=4|pb=0.1|po=0.1|eps=1e-06",
    )
    # derived: clean, x = 0: a column grows the bound by 2·asinh(1) = 1.763 and the budget
    # ln(1e-3/eps) = 29.1 takes 16 columns, so 1/8 QR per layer; seconds per strip-layer
    # = column + QR/8; layers = duration / (that × strips) − warm-up
    assert fz.replica_layers[clean4] == round(10.0 / ((1e-6 + 8e-6 / 8) * 8)) - 40
    assert fz.replica_layers[clean8] == round(10.0 / ((2e-6 + 16e-6 / 8) * 8)) - 40
    assert fz.max_layers[clean4] == round(0.5 * 3600 / ((1e-6 + 8e-6 / 8) * 8))
    # derived: with p_block = 0.1 on 4 × 8 nodes a column holds a blocking node (2θ ≈ 29.0,
    # one column per QR) with probability 1 − 0.9³², so QRs per layer lie in
    # [2·(1 − 0.9³²), 2]
    lo, hi = (round(10.0 / ((1.5e-6 + q * 8e-6) * 8)) - 40 for q in (2.0, 2 * (1 - 0.9**32)))
    assert lo <= fz.replica_layers[dis4] <= hi
    # a slower machine later, and a new width: existing slices keep their frozen layers
    slow = _calibration([(4, 1e-5, 1.5e-5, 8e-5), (16, 1e-4, 1.5e-4, 8e-4)])
    rec2 = parse_recipe({**data, "axes": {**data["axes"], "widths": [4, 8, 16]}})
    fz2 = freeze(rec2, slow, fz)
    for k in (clean4, clean8, dis4):
        assert fz2.replica_layers[k] == fz.replica_layers[k]
    assert fz2.replica_layers["N=16|pb=0.0|po=0.0|eps=1e-06"] == (
        round(10.0 / ((1e-4 + 8e-4 / 8) * 8)) - 40
    )
    assert fz2.entropy == fz.entropy


def test_a_store_frozen_by_width_keeps_its_layers_for_every_slice():
    # stores made before per-slice keys hold one replica length per width
    data = {
        "campaign": {"name": "d"},
        "axes": {"widths": [4], "couplings": [0.0], "disorder": [{"p": 0.0}, {"p": 0.1}]},
        "precision": {"target": 0.01},
        "replica": {"duration_seconds": 10.0, "warmup": 40, "strips": 8},
    }
    old = freeze(parse_recipe(data), _calibration([(4, 1e-6, 1.5e-6, 8e-6)]))
    legacy = old.to_json()
    legacy["replica_layers"] = {"4": 12345}
    legacy["max_layers"] = {"4": 12345 * 256}
    from sweepctl.campaign.plan import Frozen
    from sweepctl.campaign.recipe import Point

    fz = freeze(
        parse_recipe(data), _calibration([(4, 1e-6, 1.5e-6, 8e-6)]), Frozen.from_json(legacy)
    )
    for p in (Point(0.0, 0.0, 1e-6, 4, 0.0), Point(0.1, 0.1, 1e-6, 4, 0.0)):
        assert fz.layers_for(p) == 12345 and fz.cap_for(p) == 12345 * 256
