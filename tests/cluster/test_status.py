"""`status` tells the truth: running only while a driver holds the lease."""

from __future__ import annotations

import json
import signal
import socket

from tests.campaign.helpers import cli, kill_pids, start_cli, wait_until, worker_pids, write_recipe
from tests.campaign.test_faults import FAULT


def status(store) -> dict:
    proc = cli("status", store, "--json")
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


# FAULT with four times the replicas ((0.001 / 0.0005)^2, ~130 replicas, ~45 s on two idle
# cores): with --flush-seconds 0 the second part file comes after two of them
LONGER = {**FAULT, "precision": {"target": 0.0005, "max_layers": 3_680_000}}


def test_status_while_running_after_a_kill_and_when_done(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml", LONGER)
    store = tmp_path / "store"
    drv = start_cli("run", recipe, store, "--workers", "2", "--flush-seconds", "0")
    try:
        wait_until(
            lambda: len(list((store / "replicas").glob("part-*.parquet"))) >= 2, 120, "two batches"
        )
        live = status(store)
        assert drv.poll() is None, "the campaign ended before status could see it run"
        d = live["totals"]["driver"]
        assert d["state"] == "running" and d["pid"] == drv.pid
        assert d["host"] == socket.gethostname()
        assert live["totals"]["partial"] == 0 and live["totals"]["running"] >= 1
        assert live["totals"]["last_event"]["event"]
        text = cli("status", store).stdout
        assert "driver: running" in text and f"pid {drv.pid}" in text and "ETA" in text
        drv.send_signal(signal.SIGKILL)
        drv.wait(timeout=30)
    finally:
        if drv.poll() is None:
            drv.kill()
        kill_pids(worker_pids(store))
    dead = status(store)
    states = {p["state"] for p in dead["points"]}
    assert "running" not in states and "partial" in states
    assert dead["totals"]["driver"]["state"] == "lost"
    assert dead["totals"]["eta_seconds"] > 0  # from the throughput of the stored replicas
    text = cli("status", store).stdout
    assert "partial" in text and "without a clean-up" in text and "once a driver runs" in text
    assert cli("run", recipe, "--store", store, "--workers", "2").returncode == 0
    kill_pids(worker_pids(store))
    done = status(store)
    assert {p["state"] for p in done["points"]} <= {"done", "capped"}
    assert done["totals"]["driver"]["state"] == "stopped"
    assert "ETA" not in cli("status", store).stdout
