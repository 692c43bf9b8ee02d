"""Recipe changes take effect as documented, and ``plan --store`` says what ``run`` will do.

Real CLI runs on two local worker processes; the preview is compared with the
submissions the driver actually logged.
"""

from __future__ import annotations

import json
import re

import pytest

from tests.campaign.helpers import cli, events, write_recipe

UNREACHABLE = {"precision": {"target": 1e-5, "max_layers": 9_000}}  # every point capped


def _plan(recipe, store) -> dict:
    proc = cli("plan", recipe, "--store", store, "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return json.loads(proc.stdout)["store"]


def _last_run_submissions(store) -> tuple[dict, int]:
    """The last run's preview and the replicas it submitted before any result came back."""
    evs = events(store)
    start = max(i for i, e in enumerate(evs) if e.get("event") == "run-start")
    n = 0
    for e in evs[start + 1 :]:
        if e.get("event") == "finished":
            break
        n += e.get("event") == "submitted"
    return evs[start]["preview"], n


def _replicas_per_point(store) -> dict[str, int]:
    proc = cli("status", store, "--json")
    assert proc.returncode == 0, proc.stderr
    return {r["point"]: r["replicas"] for r in json.loads(proc.stdout)["points"]}


@pytest.fixture(scope="module")
def capped_store(tmp_path_factory):
    d = tmp_path_factory.mktemp("capped")
    store = d / "store"
    proc = cli("run", write_recipe(d / "r.toml", UNREACHABLE), "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return store


def test_a_raised_cap_reopens_capped_points_and_plan_says_so(capped_store, tmp_path):
    import shutil

    store = tmp_path / "store"
    shutil.copytree(capped_store, store)
    before = _replicas_per_point(store)
    # derived: a cap of 9 000 layers with 600-layer replicas is 15 replicas per point
    assert set(before.values()) == {15}
    raised = write_recipe(
        tmp_path / "raised.toml", {"precision": {"target": 1e-5, "max_layers": 18_000}}
    )
    preview = _plan(raised, store)
    assert preview["reopened_points"] == 6 and preview["new_points"] == 0
    proc = cli("run", raised, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    logged, submitted = _last_run_submissions(store)
    assert submitted == preview["replicas_to_submit"] > 0
    assert {k: v for k, v in logged.items() if k != "stored_rows"} == {
        k: v for k, v in preview.items() if k not in ("stored_rows", "path")
    }
    # derived: the new cap is 18 000 / 600 = 30 replicas, and the target stays out of reach
    assert set(_replicas_per_point(store).values()) == {30}


def test_a_tightened_target_reopens_points_and_plan_agrees(reference_store, tmp_path):
    import shutil

    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    tight = write_recipe(tmp_path / "tight.toml", {"precision": {"target": 0.002}})
    preview = _plan(tight, store)
    assert preview["reopened_points"] > 0
    proc = cli("run", tight, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    _, submitted = _last_run_submissions(store)
    assert submitted == preview["replicas_to_submit"]


def test_a_refused_change_gives_the_same_message_in_plan_and_run(reference_store, tmp_path):
    import shutil

    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    changed = write_recipe(tmp_path / "changed.toml", {"replica": {"strips": 6}})
    planned = cli("plan", changed, "--store", store)
    ran = cli("run", changed, "--store", store)
    assert planned.returncode == ran.returncode == 2
    line = re.sub(r"\s+", " ", planned.stderr).strip()
    assert "replica.strips" in line and line == re.sub(r"\s+", " ", ran.stderr).strip()
