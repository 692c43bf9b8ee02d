"""Campaigns on a real single-node Slurm through dask-jobqueue; all traffic on loopback."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from sweepctl.cluster.chain import read_links
from sweepctl.cluster.watch import job_end_state, list_jobs
from tests.campaign.helpers import (
    assert_row_recomputes,
    cli,
    events,
    merged,
    start_cli,
    wait_until,
    write_recipe,
)

ROOT = Path(__file__).resolve().parents[2]
PY_BIN = str(Path(sys.executable).parent)

SLOW = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.002, "max_layers": 308_000},
    "replica": {"layers": 15_400, "checkpoint_seconds": 0.3},
}


# about a minute of work on two workers: long enough to cancel a job in the middle
MEDIUM = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.001, "max_layers": 3_080_000},
    "replica": {"layers": 46_000, "checkpoint_seconds": 1},
}


# several one-minute links of about 8 s work each: 6 to 20 s of work on two workers here
# (idle to busy machine), three times MEDIUM's replicas ((0.001 / 0.0006)^2 = 2.8)
CHAIN = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.0006, "max_layers": 6_160_000},
    "replica": {"layers": 46_000, "checkpoint_seconds": 1},
}


def profile(tmp: Path, **extra) -> Path:
    body = {
        "system": '"slurm"',
        "queue": '"debug"',
        "cores": "2",
        "processes": "2",
        "memory": '"2GB"',
        "walltime": '"00:10:00"',
        "lifetime_margin": '"1m"',
        "min_jobs": "1",
        "max_jobs": "1",
        "interface": '"lo"',
        "lifetime_stagger": '"0s"',
        "prologue": f'["export PATH={PY_BIN}:$PATH", "cd {ROOT}"]',
    }
    body.update({k: v for k, v in extra.items()})
    f = tmp / "clusters.toml"
    f.write_text("[profiles.test]\n" + "\n".join(f"{k} = {v}" for k, v in body.items()) + "\n")
    return f


def jobs(name: str = "sweepctl-test") -> list[str]:
    out = subprocess.run(["squeue", "-h", "-o", "%i %j %T"], capture_output=True, text=True)
    return [ln.split()[0] for ln in out.stdout.splitlines() if name in ln]


def cancel_all(name: str = "sweepctl") -> None:
    out = subprocess.run(["squeue", "-h", "-o", "%i %j"], capture_output=True, text=True)
    ids = [ln.split()[0] for ln in out.stdout.splitlines() if name in ln]
    if ids:
        subprocess.run(["scancel", *ids], capture_output=True)


@pytest.fixture(autouse=True)
def no_leftover_jobs():
    yield
    cancel_all()


@pytest.fixture(scope="module")
def medium_reference(tmp_path_factory):
    """MEDIUM run locally, once for the tests that compare with it."""
    d = tmp_path_factory.mktemp("slurm-medium-ref")
    recipe = write_recipe(d / "recipe.toml", MEDIUM)
    assert cli("run", recipe, "--store", d / "store", "--workers", "2").returncode == 0
    return merged(d / "store")


@pytest.fixture(scope="module")
def slow_reference(tmp_path_factory):
    d = tmp_path_factory.mktemp("slurm-ref")
    recipe = write_recipe(d / "recipe.toml", SLOW)
    assert cli("run", recipe, "--store", d / "store", "--workers", "2").returncode == 0
    return merged(d / "store")


def test_campaign_through_slurmcluster_matches_local(slow_reference, tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", SLOW)
    proc = cli(
        "run",
        recipe,
        "--store",
        tmp_path / "store",
        "--cluster",
        "test",
        "--profiles",
        profile(tmp_path),
        timeout=900,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "SLURMCluster" in proc.stdout
    pd.testing.assert_frame_equal(merged(tmp_path / "store"), slow_reference, check_exact=True)
    rows = pq.read_table(tmp_path / "store" / "replicas").to_pylist()
    assert all(r["batch_job_id"] for r in rows)  # computed inside Slurm jobs
    assert all(r["worker"].startswith("tls://") for r in rows)


def test_worker_job_cancelled_mid_campaign(medium_reference, tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", MEDIUM)
    store = tmp_path / "store"
    drv = start_cli(
        "run",
        recipe,
        "--store",
        store,
        "--cluster",
        "test",
        "--profiles",
        profile(tmp_path),
        log=tmp_path / "log",
    )
    try:
        wait_until(
            lambda: sum(e.get("event") == "finished" for e in events(store)) >= 3 and jobs(),
            300,
            "three finished replicas and a running worker job",
        )
        victims = jobs()
        assert victims
        subprocess.run(["scancel", *victims], check=True)
        assert drv.wait(timeout=900) == 0, (tmp_path / "log").read_text()
    finally:
        if drv.poll() is None:
            drv.kill()
    pd.testing.assert_frame_equal(merged(store), medium_reference, check_exact=True)
    ids = {r["batch_job_id"] for r in pq.read_table(store / "replicas").to_pylist()}
    assert len(ids) >= 2  # a new job took over after the cancelled one


@pytest.mark.slow  # 3-4 minutes: a one-minute job's TIMEOUT, then the rest of the replica
def test_worker_job_hits_walltime_mid_replica(tmp_path):
    # derived: 154 000 layers of this replica took 6.8 s of CPU on this machine, so
    # 2.31 M layers need ~100 s, more than a one-minute job can give it even when the
    # machine is idle: the walltime always cuts it
    over = {
        "axes": {"widths": [8], "couplings": [0.1]},
        "precision": {"target": 0.5, "max_layers": 2_310_000},
        "replica": {"layers": 2_310_000, "strips": 52, "initial": 1, "checkpoint_seconds": 5},
    }
    recipe = write_recipe(tmp_path / "recipe.toml", over)
    store = tmp_path / "store"
    # one-minute jobs and no early retirement: Slurm's TIMEOUT ends the worker mid-replica
    prof = profile(tmp_path, walltime='"00:01:00"', lifetime_margin='"off"')
    proc = cli(
        "run", recipe, "--store", store, "--cluster", "test", "--profiles", prof, timeout=1500
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    row = pq.read_table(store / "replicas").to_pylist()[0]
    assert row["resumed_at_layer"] > 0
    assert_row_recomputes(row)  # bit-identical to an uninterrupted replica
    # how the worker jobs ended, asked of Slurm (sacct, the controller, or the
    # job-completion log where `scontrol show config` puts it)
    ids = {p.stem.rsplit("-", 1)[-1] for p in (store / "batch-logs").glob("*-*.err")}
    assert "TIMEOUT" in {job_end_state(j) for j in ids}, ids


def test_self_continuing_allocations_complete_a_campaign_unattended(tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", CHAIN)
    assert cli("run", recipe, "--store", tmp_path / "ref", "--workers", "2").returncode == 0
    store = tmp_path / "store"
    # one-minute allocations that stop 48 s before the walltime: about 8 s of work each
    prof = profile(
        tmp_path, walltime='"00:01:00"', stop_margin='"48s"', python=f'"{sys.executable}"'
    )
    proc = cli(
        "cluster", "submit", recipe, "--store", store, "--cluster", "test", "--profiles", prof
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr

    def ended():
        ends = [r for r in read_links(store) if r.get("event") == "link-end"]
        return ends and ends[-1]["outcome"] != "continued" and ends[-1]

    last = wait_until(ended, 900, "the chain to end", poll=1.0)
    out = "\n".join(p.read_text() for p in (store / "allocations").glob("*.*"))
    assert last["outcome"] == "complete", out
    links = [r for r in read_links(store) if r.get("event") == "link-start"]
    assert len(links) >= 2, links  # it took several allocations, none submitted by hand
    jobs = [r["job"] for r in links]
    assert len(set(jobs)) == len(jobs)
    # each link ended by itself before its walltime (Slurm's own record)
    wait_until(lambda: all(job_end_state(j) for j in jobs), 120, "the last job to end", poll=1.0)
    assert {job_end_state(j) for j in jobs} == {"COMPLETED"}, out
    pd.testing.assert_frame_equal(merged(store), merged(tmp_path / "ref"), check_exact=True)
    assert cli("audit", store).returncode == 0
    rows = pq.read_table(store / "replicas").to_pylist()
    assert {r["batch_job_id"] for r in rows} <= set(jobs)
    resumed = [r for r in rows if r["resumed_at_layer"] > 0]
    for r in resumed[:2]:  # replicas cut by a link's stop continued bit-identically
        assert_row_recomputes(r)


def test_one_listing_sees_live_jobs_and_slurm_tells_how_they_ended():
    def sub(cmd: str) -> str:
        out = subprocess.run(
            ["sbatch", "--parsable", "-J", "sweepctl-probe", "-o", "/dev/null", "--wrap", cmd],
            capture_output=True,
            text=True,
            check=True,
        )
        return out.stdout.strip().split(";")[0]

    a, b = sub("sleep 60"), sub("true")
    wait_until(lambda: job_end_state(b) == "COMPLETED", 60, "the short job to complete")
    listing = list_jobs("slurm")
    assert listing is not None and a in listing and b not in listing
    subprocess.run(["scancel", a], check=True)
    wait_until(lambda: job_end_state(a) == "CANCELLED", 60, "the cancelled job's end state")
