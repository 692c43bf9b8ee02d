"""Campaigns on a real single-node Slurm through dask-jobqueue; all traffic on loopback."""

from __future__ import annotations

import itertools
import subprocess
import sys
from pathlib import Path

import numpy as np
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


def default_partition() -> str:
    """The partition Slurm submits to by default (``sinfo`` marks it with ``*``), so the
    tier runs on any working Slurm, not only on the one `.ci/slurm-up.sh` sets up."""
    try:
        out = subprocess.run(
            ["sinfo", "-h", "-o", "%P"], capture_output=True, text=True, timeout=15
        ).stdout.split()
    except (OSError, subprocess.SubprocessError):
        return ""
    marked = [p.rstrip("*") for p in out if p.endswith("*")]
    return marked[0] if marked else (out[0] if out else "")


SLOW = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.002, "max_layers": 308_000},
    "replica": {"layers": 15_400, "checkpoint_seconds": 0.3},
}


# A fixed amount of work, whatever the machine's speed: each of the 9 points stops at
# its first round of `initial` = 4 replicas (the cap max_layers = 4 x layers ends it
# there). derived: 9 x 4 replicas x 240 032 layers x 26 strips at the idle
# strip-layer rates of `sweepctl bench` here (1.9e-7, 2.6e-7, 4.0e-7 s for N = 2, 3, 4)
# = 64 s of CPU, ~32 s on two workers; replicas of 1.2-2.5 s (0.4-0.8 s on a machine
# three times faster), so a 0.2 s checkpoint shows a replica mid-way
MEDIUM = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.01, "max_layers": 4 * 240_000},
    "replica": {"layers": 240_000, "initial": 4, "checkpoint_seconds": 0.2},
}


# A fixed amount of work for the chain: each of the 9 points stops at its first round of
# 66 replicas (the cap). A link's driver stops 12 s after it starts (walltime 60 s, stop
# margin 48 s), which leaves ~10 s of work on two workers here, ~11 s on a machine three
# times faster and ~5 s on one three times slower (startup ~2 s here). derived, with the
# rates above: 594 replicas x 46 032 layers x 26 strips = 202 s of CPU idle, 67 s three
# times faster = three links of 2 x 11 s at least; a replica lasts at most 0.5 s idle,
# 1.5 s three times slower, under a third of the slowest link's ~5 s: every link stores
CHAIN = {
    "axes": {"widths": [2, 3, 4]},
    "precision": {"target": 0.01, "max_layers": 66 * 46_000},
    "replica": {"layers": 46_000, "initial": 66, "checkpoint_seconds": 0.1},
}


def profile(tmp: Path, **extra) -> Path:
    body = {
        "system": '"slurm"',
        "queue": f'"{default_partition()}"',
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


def jobs(name: str = "sweepctl-test", state: str | None = None) -> list[str]:
    """Ids of the queued jobs named ``name`` (only those in ``state``, e.g. RUNNING)."""
    out = subprocess.run(["squeue", "-h", "-o", "%i %j %T"], capture_output=True, text=True)
    rows = [ln.split() for ln in out.stdout.splitlines() if name in ln]
    return [r[0] for r in rows if state is None or r[-1] == state]


def checkpoints(store: Path) -> list[Path]:
    """Checkpoints of replicas in flight (the driver removes them once rows are stored)."""
    d = store / "checkpoints"
    return list(d.rglob("*.ckpt")) if d.exists() else []


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
        "--flush-seconds",
        "0",  # each replica's row and "finished" event as it arrives
        log=tmp_path / "log",
    )
    try:
        # the worker job has stored replicas and is in the middle of another (its
        # checkpoint); with MEDIUM's fixed work most replicas are still to come
        wait_until(
            lambda: (
                sum(e.get("event") == "finished" for e in events(store)) >= 3
                and jobs(state="RUNNING")
                and checkpoints(store)
            ),
            300,
            "three finished replicas, a running worker job and a replica in flight",
        )
        victims = jobs(state="RUNNING")
        assert victims
        subprocess.run(["scancel", *victims], check=True)
        assert drv.wait(timeout=900) == 0, (tmp_path / "log").read_text()
    finally:
        if drv.poll() is None:
            drv.kill()
    pd.testing.assert_frame_equal(merged(store), medium_reference, check_exact=True)
    ids = {r["batch_job_id"] for r in pq.read_table(store / "replicas").to_pylist()}
    # the cancelled job stored some replicas, a new job took over and stored the rest
    assert set(victims) & ids and len(ids) >= 2, (victims, ids)


@pytest.mark.slow  # ~7 minutes: several one-minute jobs' TIMEOUTs, then the replica's end
def test_worker_job_hits_walltime_mid_replica(tmp_path):
    # derived: this replica runs at 7.2e-7 s of CPU per strip-layer here (6.9e-7 at
    # best), and a one-minute job's TIMEOUT comes 66-88 s after it starts (the
    # job-completion log), so no job computes more than ~85 s of it. 7.2 M layers x 52
    # strips = 260 s at the best rate, 87 s on a machine three times faster: the
    # walltime always cuts it. Three times slower: ~780 s in ~15 jobs, within the limit
    over = {
        "axes": {"widths": [8], "couplings": [0.1]},
        "precision": {"target": 0.5, "max_layers": 7_200_000},
        "replica": {"layers": 7_200_000, "strips": 52, "initial": 1, "checkpoint_seconds": 5},
    }
    recipe = write_recipe(tmp_path / "recipe.toml", over)
    store = tmp_path / "store"
    # one-minute jobs and no early retirement: Slurm's TIMEOUT ends the worker mid-replica
    prof = profile(tmp_path, walltime='"00:01:00"', lifetime_margin='"off"')
    # the same replica uninterrupted, computed meanwhile on the core the one-replica
    # worker job leaves idle (afterwards it would add the whole replica's time again)
    ref = start_cli("run", recipe, "--store", tmp_path / "ref", "--workers", "1")
    try:
        proc = cli(
            "run", recipe, "--store", store, "--cluster", "test", "--profiles", prof, timeout=2400
        )
        assert proc.returncode == 0, proc.stdout + proc.stderr
        assert ref.wait(timeout=2400) == 0
    finally:
        if ref.poll() is None:
            ref.kill()
    row = pq.read_table(store / "replicas").to_pylist()[0]
    fresh = pq.read_table(tmp_path / "ref" / "replicas").to_pylist()[0]
    assert row["resumed_at_layer"] > 0 and fresh["resumed_at_layer"] == 0
    for col in ("gamma_strips", "exponents"):  # bit-identical to the uninterrupted replica
        assert np.asarray(row[col]).tobytes() == np.asarray(fresh[col]).tobytes(), col
    # how the worker jobs ended, asked of Slurm (sacct, the controller, or the
    # job-completion log where `scontrol show config` puts it)
    ids = {p.stem.rsplit("-", 1)[-1] for p in (store / "batch-logs").glob("*-*.err")}
    assert "TIMEOUT" in {job_end_state(j) for j in ids}, ids


def test_self_continuing_allocations_complete_a_campaign_unattended(tmp_path):
    recipe = write_recipe(tmp_path / "recipe.toml", CHAIN)
    ref = cli("run", recipe, "--store", tmp_path / "ref", "--workers", "2", timeout=1200)
    assert ref.returncode == 0, ref.stdout + ref.stderr
    store = tmp_path / "store"
    # one-minute allocations whose driver stops 12 s after it starts (see CHAIN)
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

    last = wait_until(ended, 2400, "the chain to end", poll=1.0)
    out = "\n".join(p.read_text() for p in (store / "allocations").glob("*.*"))
    assert last["outcome"] == "complete", out
    links = [r for r in read_links(store) if r.get("event") == "link-start"]
    assert len(links) >= 2, links  # it took several allocations, none submitted by hand
    assert all(b["rows"] > a["rows"] for a, b in itertools.pairwise(links)), links
    jobs = [r["job"] for r in links]
    assert len(set(jobs)) == len(jobs)
    # each link ended by itself before its walltime (Slurm's own record)
    wait_until(lambda: all(job_end_state(j) for j in jobs), 120, "the last job to end", poll=1.0)
    assert {job_end_state(j) for j in jobs} == {"COMPLETED"}, out
    pd.testing.assert_frame_equal(merged(store), merged(tmp_path / "ref"), check_exact=True)
    assert cli("audit", store).returncode == 0
    rows = pq.read_table(store / "replicas").to_pylist()
    assert {r["batch_job_id"] for r in rows} <= set(jobs)
    # replicas cut by a link's stop continued bit-identically; when no stop happened to
    # cut one (a fast machine), rows of the first and last links recompute instead, so
    # the check never passes empty
    resumed = [r for r in rows if r["resumed_at_layer"] > 0]
    by_job = {r["batch_job_id"]: r for r in rows}
    check = resumed[:2] or [by_job[j] for j in (jobs[0], jobs[-1]) if j in by_job]
    assert check, (len(rows), jobs)
    for r in check:
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

    # a lives until cancelled here, however long b waits for a CPU
    a, b = sub("sleep 3600"), sub("true")
    try:
        wait_until(lambda: job_end_state(b) == "COMPLETED", 120, "the short job to complete")
        # b may still be shown COMPLETING for a moment after Slurm recorded its end
        listing = wait_until(
            lambda: (got := list_jobs("slurm")) is not None and b not in got and got,
            60,
            "a listing without the ended job",
        )
        assert a in listing, listing
    finally:
        subprocess.run(["scancel", a], check=True)
    wait_until(lambda: job_end_state(a) == "CANCELLED", 60, "the cancelled job's end state")
