"""Stored numbers cannot be counted twice, and contradictory rows are refused everywhere.

Real stores made by the real CLI (``reference_store``: two local worker processes);
part files are duplicated or altered by hand, as an accident or a careless copy would.
"""

from __future__ import annotations

import shutil

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.campaign.helpers import cli, events, merged, snapshot, write_recipe


def _raw_keys(store) -> list[tuple[str, int]]:
    """Every (point, replica) in every part file, read past the store's reader."""
    out = []
    for part in sorted((store / "replicas").glob("part-*.parquet")):
        t = pq.read_table(part, columns=["point_key", "replica"])
        out += list(zip(t["point_key"].to_pylist(), t["replica"].to_pylist(), strict=True))
    return out


def test_a_duplicated_part_file_changes_nothing_and_audit_names_it(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    before = merged(store, drop_timing=False)
    status_before = cli("status", store, "--json").stdout
    part = sorted((store / "replicas").glob("part-*.parquet"))[0]
    shutil.copy(part, part.with_name("part-zz-copy.parquet"))
    assert len(_raw_keys(store)) > len(set(_raw_keys(store)))  # the copy is really there
    after = merged(store, drop_timing=False)
    # every number of the per-point table is unchanged, bit for bit (cpu_hours included)
    pd_equal = before.equals(after)
    assert pd_equal, before.compare(after) if before.shape == after.shape else after
    assert cli("status", store, "--json").stdout == status_before
    proc = cli("audit", store)
    assert proc.returncode == 0, proc.stdout
    assert "part-zz-copy.parquet" in proc.stdout and "identical numbers" in proc.stdout


@pytest.mark.parametrize("command", ["merge", "status", "fit", "audit"])
def test_the_same_replica_with_different_numbers_is_refused(reference_store, tmp_path, command):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    part = sorted((store / "replicas").glob("part-*.parquet"))[0]
    t = pq.read_table(part)
    rows = t.slice(0, 1).to_pylist()
    rows[0]["gamma_strips"] = [g * 1.01 for g in rows[0]["gamma_strips"]]
    pq.write_table(pa.Table.from_pylist(rows, schema=t.schema), part.with_name("part-zz.parquet"))
    snap = snapshot(store)
    proc = cli(command, store)
    # the console wraps long lines wherever the store's path puts the break: compare words
    out, err = " ".join(proc.stdout.split()), " ".join(proc.stderr.split())
    if command == "audit":
        assert proc.returncode == 1 and "different numbers" in out, proc.stdout
    else:
        assert proc.returncode == 2, proc.stdout + proc.stderr
        assert "different numbers" in err and "Traceback" not in err, proc.stderr
    assert snapshot(store) == snap  # nothing stored was touched


def test_a_signal_inside_the_flush_writes_no_row_twice(tmp_path):
    # Fault injection: the driver sends itself SIGTERM right after a part file is in place
    # and before its checkpoints are removed and the buffer cleared (a batch flush, not
    # the final one: with --flush-seconds 0 every finished replica is a batch flush).
    from tests.campaign.test_faults import FAULT

    recipe = write_recipe(tmp_path / "recipe.toml", {**FAULT, "axes": {"widths": [2, 3]}})
    ref, store = tmp_path / "ref", tmp_path / "store"
    assert cli("run", recipe, "--store", ref, "--workers", "2").returncode == 0
    proc = cli(
        *("run", recipe, store, "--workers", "2", "--flush-seconds", "0"),
        env={"SWEEPCTL_FAULT": "signal-in-flush"},
    )
    assert proc.returncode == 130, proc.stdout + proc.stderr
    assert events(store)[-1]["event"] == "interrupted"
    keys = _raw_keys(store)
    assert keys and len(keys) == len(set(keys))
    proc = cli("run", recipe, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    keys = _raw_keys(store)
    assert len(keys) == len(set(keys))
    assert merged(store).equals(merged(ref))


# ------------------------------------------------------------------------------ the lock

_HOLD = (
    "import fcntl, os, sys, time\n"
    "fd = os.open(sys.argv[1], os.O_RDWR | os.O_CREAT)\n"
    "fcntl.flock(fd, fcntl.LOCK_EX)\n"
    "print('held', flush=True)\n"
    "time.sleep(600)\n"
)


def test_lock_held_by_a_live_process_refuses_and_is_free_once_it_dies(reference_store, tmp_path):
    import subprocess
    import sys

    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    recipe = write_recipe(tmp_path / "recipe.toml")
    # a driver that died between creating the lock file and writing its record holds
    # nothing: an empty lock file must not block anyone
    (store / "lock").write_text("")
    proc = cli("run", recipe, "--store", store)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # a live holder of the flock (its record not even written) is respected ...
    holder = subprocess.Popen(
        [sys.executable, "-c", _HOLD, str(store / "lock")], stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        proc = cli("run", recipe, "--store", store)
        assert proc.returncode == 2 and "in use by the driver" in proc.stderr
        assert "Traceback" not in proc.stderr
    finally:
        holder.kill()
        holder.wait(timeout=30)
        holder.stdout.close()
    # ... and once it is dead the lock is free without anyone removing a file
    proc = cli("run", recipe, "--store", store)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_two_drivers_taking_over_a_dead_drivers_lock_never_overlap(tmp_path):
    import json
    import socket

    from tests.campaign.helpers import kill_pids, start_cli, worker_pids
    from tests.campaign.test_faults import FAULT

    recipe = write_recipe(tmp_path / "recipe.toml", {**FAULT, "axes": {"widths": [2]}})
    store = tmp_path / "store"
    assert cli("plan", recipe).returncode == 0
    store.mkdir()
    # the record of a driver that died (pid far above any live one here)
    (store / "lock").write_text(json.dumps({"pid": 2**22 + 12345, "host": socket.gethostname()}))
    a = start_cli("run", recipe, "--store", store, "--workers", "1", log=tmp_path / "a.log")
    b = start_cli("run", recipe, "--store", store, "--workers", "1", log=tmp_path / "b.log")
    try:
        codes = sorted([a.wait(timeout=600), b.wait(timeout=600)])
    finally:
        for p in (a, b):
            if p.poll() is None:
                p.kill()
        kill_pids(worker_pids(store))
    logs = (tmp_path / "a.log").read_text() + (tmp_path / "b.log").read_text()
    # never two owners at once: run-start/run-end of different pids do not interleave
    owner = None
    for e in events(store):
        if e.get("event") == "run-start":
            assert owner is None, logs
            owner = e["pid"]
        elif e.get("event") in ("run-end", "interrupted"):
            owner = None
    assert codes in ([0, 0], [0, 2]), logs  # the second either waited its turn or was refused
    keys = _raw_keys(store)
    assert len(keys) == len(set(keys))


def test_a_met_target_does_not_stop_a_point_before_51_strip_values(tmp_path):
    # [S1] tests/REFERENCES.md: σ̂ from n values has relative error 1/√(2(n − 1)); 10 %
    # needs n ≥ 51. 8 strips per replica and a target of 50 % that the first round of 2
    # replicas (16 values) already meets: the rule must go on to ceil(51/8) = 7 replicas
    over = {
        "axes": {"widths": [2], "couplings": [0.0]},
        "precision": {"target": 0.5, "max_layers": 100 * 600},
        "replica": {"strips": 8, "initial": 2},
    }
    store = tmp_path / "store"
    proc = cli("run", write_recipe(tmp_path / "r.toml", over), "--store", store, "--workers", "1")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    rows = pq.read_table(store / "replicas").to_pylist()
    assert len(rows) == 7, [r["replica"] for r in rows]
    assert sum(len(r["gamma_strips"]) for r in rows) == 56 >= 51
