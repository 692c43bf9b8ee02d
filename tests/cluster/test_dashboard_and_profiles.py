"""Watching a live campaign: the opt-in dashboard; `cluster list` and `cluster show`."""

from __future__ import annotations

import re
import urllib.request
from pathlib import Path

from tests.campaign.helpers import (
    cli,
    events,
    kill_pids,
    start_cli,
    wait_until,
    worker_pids,
    write_recipe,
)
from tests.campaign.test_faults import FAULT

EXAMPLES = Path(__file__).resolve().parents[2] / "deploy" / "clusters.example.toml"


def test_dashboard_on_loopback_with_its_address_printed(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml", {**FAULT, "axes": {"widths": [2, 3]}})
    store = tmp_path / "store"
    log = tmp_path / "log"
    drv = start_cli("run", recipe, "--store", store, "--workers", "1", "--dashboard", "on", log=log)
    try:
        ev = wait_until(
            lambda: next((e for e in events(store) if e.get("event") == "dashboard"), None),
            120,
            "the dashboard event",
        )
        addr = ev["address"]
        assert re.fullmatch(r"http://127\.0\.0\.1:\d+/", addr), addr
        with urllib.request.urlopen(addr + "health", timeout=10) as r:  # it answers, live
            assert r.read().decode().strip() == "ok"
        assert drv.wait(timeout=300) == 0, log.read_text()
    finally:
        if drv.poll() is None:
            drv.kill()
        kill_pids(worker_pids(store))
    assert f"dashboard: {addr}" in log.read_text()
    # without bokeh the address answers but has no pages: the message says what to install
    import importlib.util

    hint = "its pages need bokeh: pip install bokeh"
    said = " ".join(log.read_text().split())  # the console wraps long lines
    assert (hint in said) == (importlib.util.find_spec("bokeh") is None), said


def test_no_dashboard_unless_asked(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    proc = cli("run", recipe, "--store", tmp_path / "s", "--workers", "1")
    assert proc.returncode == 0 and "dashboard" not in proc.stdout
    assert not any(e.get("event") == "dashboard" for e in events(tmp_path / "s"))


def test_bad_dashboard_address_names_the_option(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml")
    proc = cli("run", recipe, "--store", tmp_path / "s", "--dashboard", "localhost:http")
    assert proc.returncode == 2 and "--dashboard" in proc.stderr and "HOST:PORT" in proc.stderr
    assert "Traceback" not in proc.stderr and not (tmp_path / "s").exists()


def test_cluster_list_and_show(tmp_path):
    proc = cli("cluster", "list", "--profiles", EXAMPLES)
    assert proc.returncode == 0, proc.stderr
    for name in ("slurm-standard", "pbs-long", "sge-short", "lsf-normal"):
        assert name in proc.stdout
    proc = cli("cluster", "show", "pbs-long", "--profiles", EXAMPLES)
    assert proc.returncode == 0, proc.stderr
    out = dict(ln.split(None, 1) for ln in proc.stdout.splitlines() if ln.strip() and ln[0] != " ")
    # from the file: system, walltime, queue; from the packaged defaults: the lifetime margin
    assert out["system"] == "pbs" and out["walltime"] == "48:00:00"
    assert out["queue"] == "long" and out["lifetime_margin"] == "10m"
    assert out["account"] == "qh2026" and out["interface"] == "(not set)"  # no reprs
    proc = cli("cluster", "show", "nope", "--profiles", EXAMPLES)
    assert proc.returncode == 2 and "slurm-standard" in proc.stderr  # lists the known ones
