"""One JSON convention: ``--json`` prints one strict JSON document (no NaN or Infinity)
on standard output; files are written with ``--out`` and an unwritable path is one line."""

from __future__ import annotations

import json
import shutil

import pytest

from tests.campaign.helpers import cli, write_recipe


def strict(text: str):
    """Parse as strict JSON (RFC 8259): NaN, Infinity and -Infinity are refused."""

    def refuse(name):
        raise ValueError(f"non-standard JSON constant {name}")

    return json.loads(text, parse_constant=refuse)


@pytest.fixture
def unfinished_store(reference_store, tmp_path):
    # no rows stored for any point: Γ unknown and relative errors infinite internally
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    for p in (store / "replicas").glob("part-*.parquet"):
        p.unlink()
    return store


def test_status_json_is_strict_with_unknown_values(unfinished_store):
    proc = cli("status", unfinished_store, "--json")
    assert proc.returncode == 0, proc.stderr
    doc = strict(proc.stdout)
    assert doc["points"] and all(p["Gamma"] is None for p in doc["points"])
    assert all(p["rel_err"] is None for p in doc["points"])


@pytest.mark.parametrize(
    "args",
    [
        ("status", "{store}", "--json"),
        ("merge", "{store}", "--out", "{tmp}/m", "--json"),
        ("audit", "{store}", "--json"),
        ("plan", "{recipe}", "--json"),
    ],
    ids=["status", "merge", "audit", "plan"],
)
def test_every_json_is_one_strict_document_on_stdout(args, reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    recipe = write_recipe(tmp_path / "r.toml")
    fill = {"store": store, "tmp": tmp_path, "recipe": recipe}
    proc = cli(*[a.format(**fill) for a in args])
    assert proc.returncode == 0, proc.stderr
    strict(proc.stdout)  # the whole of stdout, nothing else


def test_audit_json_keeps_the_exit_status(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    (store / "replicas" / "part-foreign.parquet").write_bytes(b"not parquet")
    proc = cli("audit", store, "--json")
    doc = strict(proc.stdout)
    assert proc.returncode == 1 and doc["ok"] is False and doc["problems"]


def test_merge_to_an_unwritable_place_is_one_line(reference_store, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory")
    proc = cli("merge", reference_store, "--out", blocker / "out")
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and "--out" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_plan_says_where_it_keeps_the_calibration_it_measured(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml")
    cache = tmp_path / "cache"
    proc = cli("plan", recipe, env={"XDG_CACHE_HOME": str(cache), "COLUMNS": "400"})
    assert proc.returncode == 0, proc.stderr
    (saved,) = (cache / "sweepctl").glob("calibration-*.json")
    assert f"saved to {saved}" in proc.stdout
    # a wider strip than the cache holds is measured, not extrapolated from N = 2-4
    # (QR ∝ N³ from two small widths), and added to the cache
    wide = write_recipe(tmp_path / "wide.toml", {"axes": {"widths": [2, 3, 24]}})
    proc = cli("plan", wide, env={"XDG_CACHE_HOME": str(cache), "COLUMNS": "400"})
    assert proc.returncode == 0, proc.stderr
    assert f"calibration {saved}, with N = 24 measured now" in proc.stdout, proc.stdout
    widths = {r["width"] for r in json.loads(saved.read_text())["widths"]}
    assert {2, 3, 4, 24} <= widths, widths
    # a cache measured with other kernel code (here: its fingerprint changed) prices by
    # the old speed: it is measured again, not used
    data = json.loads(saved.read_text())
    data["kernel"] = "0" * 16
    saved.write_text(json.dumps(data))
    proc = cli("plan", recipe, env={"XDG_CACHE_HOME": str(cache), "COLUMNS": "400"})
    assert proc.returncode == 0, proc.stderr
    assert f"measured now at N = 2, 3, 4, saved to {saved}" in proc.stdout, proc.stdout
    assert json.loads(saved.read_text())["kernel"] != "0" * 16


def test_the_store_is_an_argument_like_everywhere_else(reference_store, tmp_path):
    import pandas as pd

    from tests.campaign.helpers import merged

    recipe = write_recipe(tmp_path / "r.toml")
    store = tmp_path / "store"
    proc = cli("run", recipe, store, "--workers", "2")
    assert proc.returncode == 0, proc.stderr
    pd.testing.assert_frame_equal(merged(store), merged(reference_store), check_exact=True)
    preview = strict(cli("plan", recipe, store, "--json").stdout)
    assert preview["store"]["replicas_to_submit"] == 0
    # given twice, differently: one line, nothing made
    proc = cli("run", recipe, tmp_path / "a", "--store", tmp_path / "b")
    assert proc.returncode == 2 and "give the store once" in proc.stderr
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()
    proc = cli("run", recipe)
    assert proc.returncode == 2 and "STORE: missing" in proc.stderr


def test_a_finished_store_has_nothing_left_even_without_a_calibration(reference_store, tmp_path):
    # a newcomer's machine has no calibration cached; a finished point still has 0 left
    # (it used to print "?", as if the cost were unknown)
    env = {"XDG_CACHE_HOME": str(tmp_path / "empty-cache")}
    proc = cli("status", reference_store, "--json", env=env)
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)
    assert data["totals"]["done"] == data["totals"]["points"]  # the fixture ran to the end
    assert data["totals"]["remaining_cpu_hours"] == 0.0
    assert all(p["remaining_cpu_hours"] == 0.0 for p in data["points"])
    assert not (tmp_path / "empty-cache").exists()  # status measures nothing
