"""A demo-size campaign on a real LocalCluster with worker processes, through the CLI."""

from __future__ import annotations

import json
import math
import shutil

import pandas as pd
import pytest

from sweepctl.campaign.store import REPLICA_SCHEMA
from tests.campaign.helpers import cli, events, merged, snapshot, write_recipe

MERGED_COLUMNS = [
    "p_block",
    "p_open",
    "epsilon",
    "N",
    "x",
    "Gamma",
    "Gamma_err",
    "n_strips",
    "replicas",
    "layers",
    "cpu_hours",
    "reached_target",
]


def test_run_merge_status_audit(reference_store):
    df = merged(reference_store, drop_timing=False)
    assert list(df.columns) == MERGED_COLUMNS
    assert len(df) == 6 and set(df["N"]) == {2, 3}
    assert df["reached_target"].all()
    assert (df["Gamma_err"] / df["Gamma"] <= 0.03).all()
    # every error bar rests on at least 51 strip values (2 replicas × 26 strips here)
    assert (df["n_strips"] == 26 * df["replicas"]).all() and (df["n_strips"] >= 51).all()
    assert (df["replicas"] >= 2).all() and (df["cpu_hours"] > 0).all()
    # layers = measured layers per strip summed over replicas
    assert (df["layers"] == df["replicas"] * 600).all()
    csv = pd.read_csv(reference_store / "merged" / "points.csv")
    assert len(csv) == 6 and list(csv.columns) == MERGED_COLUMNS

    st = cli("status", reference_store, "--json")
    assert st.returncode == 0, st.stderr
    doc = json.loads(st.stdout)
    assert doc["totals"]["done"] == doc["totals"]["points"] == 6
    assert all(p["state"] == "done" and p["rel_err"] <= 0.03 for p in doc["points"])
    plain = cli("status", reference_store)
    assert plain.returncode == 0 and "6/6 points done" in plain.stdout

    au = cli("audit", reference_store, "--recompute", "3", "--seed", "7", "--point", "N=3,x=0")
    assert au.returncode == 0, au.stdout + au.stderr
    assert "0 problem(s)" in au.stdout and "audit passed" in au.stdout
    assert au.stdout.count("identical:") == 2  # the selected point has 2 replicas
    assert "MISMATCH" not in au.stdout
    # a point the store does not hold is an input error, not an empty audit
    nope = cli("audit", reference_store, "--point", "N=99,x=0")
    assert nope.returncode == 2, nope.stdout + nope.stderr
    assert "--point N=99,x=0: no stored replica matches" in nope.stderr, nope.stderr
    assert "Traceback" not in nope.stderr

    kinds = {e["event"] for e in events(reference_store)}
    assert {"run-start", "cluster", "submitted", "started", "finished", "run-end"} <= kinds


def test_rows_carry_seeds_and_provenance(reference_store):
    import pyarrow.parquet as pq

    from sweepctl.campaign.recipe import Point

    parts = sorted((reference_store / "replicas").glob("part-*.parquet"))
    assert parts
    t = pq.read_table(parts[0])
    assert t.schema.remove_metadata().equals(REPLICA_SCHEMA.remove_metadata())
    assert b"sweepctl.campaign" in t.schema.metadata
    row = t.to_pylist()[0]
    pt = Point(row["p_block"], row["p_open"], row["epsilon"], row["width"], row["x"])
    assert row["spawn_key"] == [*pt.key_ints, row["replica"]]
    assert row["entropy"] == "0x123456789abcdef0123456789abcdef0"
    for k in ("worker", "host", "sweepctl_version", "git_commit", "numpy_version"):
        assert row[k]
    assert row["finished"] >= row["started"]
    assert len(row["gamma_strips"]) == 26 and len(row["exponents"]) == row["width"]


def test_one_worker_gives_the_same_table(reference_store, tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml")
    proc = cli("run", recipe, "--store", tmp_path / "one", "--workers", "1")
    assert proc.returncode == 0, proc.stderr
    pd.testing.assert_frame_equal(
        merged(tmp_path / "one"), merged(reference_store), check_exact=True
    )


def test_rerun_of_a_finished_campaign_computes_nothing(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    parts = snapshot(store / "replicas")
    recipe = write_recipe(tmp_path / "recipe.toml")
    proc = cli("run", recipe, "--store", store)
    assert proc.returncode == 0, proc.stderr
    assert "0 replicas computed" in proc.stdout
    assert snapshot(store / "replicas") == parts


def test_adding_a_width_keeps_every_seed_and_row(reference_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)
    before = snapshot(store / "replicas")
    wider = write_recipe(tmp_path / "wider.toml", {"axes": {"widths": [2, 3, 4]}})
    proc = cli("run", wider, "--store", store)
    assert proc.returncode == 0, proc.stderr
    after = snapshot(store / "replicas")
    # every earlier part file (hence every earlier row) is byte-identical
    assert all(after.get(k) == v for k, v in before.items())
    assert len(after) > len(before)
    ext = merged(store)
    old = ext[ext["N"] < 4].reset_index(drop=True)
    pd.testing.assert_frame_equal(old, merged(reference_store), check_exact=True)
    assert set(ext["N"]) == {2, 3, 4}
    # seeds do not depend on list positions: a fresh store of the wider recipe agrees
    fresh = tmp_path / "fresh"
    proc = cli("run", wider, "--store", fresh)
    assert proc.returncode == 0, proc.stderr
    pd.testing.assert_frame_equal(merged(fresh), ext, check_exact=True)


def test_plan_json(tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml")
    proc = cli("plan", recipe, "--json")
    assert proc.returncode == 0, proc.stderr
    pl = json.loads(proc.stdout)
    assert pl["points"] == 6 and len(pl["per_point"]) == 6
    assert {g["N"] for g in pl["widths"]} == {2, 3}
    for g in pl["widths"]:
        # [M3]/[R1] tests/REFERENCES.md: rel ≈ √(k N / (Γ L S R)), k = 1.00 measured, Γ ≈ 0.85
        # assumed before data; the first round is 2
        # (2 × 26 strips ≥ the 51 strip values a point needs)
        assert g["expected_replicas_per_point"] == max(
            2, math.ceil(1.0 * g["N"] / (0.85 * 0.03**2) / (600 * 26))
        )
        assert g["max_replicas"] == 10 and g["cpu_hours"] > 0
    assert "SeedSequence" in pl["seed_scheme"]


@pytest.mark.parametrize("cmd", ["merge", "status", "audit"])
def test_commands_on_a_missing_store(cmd, tmp_path):
    proc = cli(cmd, tmp_path / "nothing")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    assert "no such directory" in proc.stderr
