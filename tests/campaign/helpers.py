"""Shared helpers for campaign tests: recipes, real CLI processes, store snapshots."""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd

BASE = {
    "campaign": {"name": "test-campaign", "entropy": "0x1234_5678_9abc_def0_1234_5678_9abc_def0"},
    "axes": {
        "widths": [2, 3],
        "couplings": [-0.2, 0.0, 0.2],
        "disorder": [{"p": 0.0}],
        "epsilon": [1e-6],
    },
    # 2 replicas of 26 strips: the 51 strip values a point needs before it may stop
    "precision": {"target": 0.03, "max_layers": 6_000},
    "replica": {"layers": 600, "warmup": 32, "strips": 26, "initial": 2, "checkpoint_seconds": 60},
}


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return v if v.startswith("0x") else json.dumps(v)
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return repr(v)


def recipe_text(overrides: dict | None = None) -> str:
    """TOML for BASE with ``{"section": {"key": value}}`` overrides (None deletes)."""
    data = json.loads(json.dumps(BASE))
    for sec, body in (overrides or {}).items():
        data.setdefault(sec, {})
        for k, v in body.items():
            if v is None:
                data[sec].pop(k, None)
            else:
                data[sec][k] = v
    lines = []
    for sec, body in data.items():
        lines.append(f"[{sec}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in body.items()]
        lines.append("")
    return "\n".join(lines)


def write_recipe(path: Path, overrides: dict | None = None) -> Path:
    path.write_text(recipe_text(overrides))
    return path


def cli(*args: str, env: dict | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    """Run the real ``sweepctl`` command in a subprocess."""
    return subprocess.run(
        [sys.executable, "-m", "sweepctl", *map(str, args)],
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, **(env or {})},
    )


def start_cli(*args: str, env: dict | None = None, log: Path | None = None) -> subprocess.Popen:
    """Start the real ``sweepctl`` in the background (output to ``log``)."""
    cmd = [sys.executable, "-m", "sweepctl", *map(str, args)]
    full_env = {**os.environ, **(env or {})}
    if log is None:
        return subprocess.Popen(
            cmd, stdout=subprocess.DEVNULL, stderr=subprocess.STDOUT, env=full_env
        )
    with open(log, "w") as out:  # the child keeps its own descriptor
        return subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=full_env)


def events(store: Path) -> list[dict]:
    f = store / "events.jsonl"
    if not f.exists():
        return []
    out = []
    for line in f.read_text().splitlines():
        with contextlib.suppress(ValueError):
            out.append(json.loads(line))
    return out


def wait_until(pred, timeout: float, what: str, poll: float = 0.1):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        v = pred()
        if v:
            return v
        time.sleep(poll)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def worker_pids(store: Path) -> list[int]:
    """Worker process ids the driver(s) recorded (own pids, not their parents)."""
    pids = []
    for e in events(store):
        if e.get("event") == "cluster":
            pids += [int(v[0]) for v in e["workers"].values()]
    return pids


def kill_pids(pids) -> None:
    for pid in pids:
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.kill(pid, signal.SIGKILL)


def merged(store: Path, *, drop_timing: bool = True) -> pd.DataFrame:
    """``sweepctl merge`` through the CLI, read back; cpu_hours measures the machine."""
    proc = cli("merge", store)
    assert proc.returncode == 0, proc.stderr
    df = pd.read_parquet(store / "merged" / "points.parquet")
    return df.drop(columns=["cpu_hours"]) if drop_timing else df


def snapshot(root: Path) -> dict[str, str]:
    """SHA-256 of every file below ``root`` (relative path → digest)."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def assert_row_recomputes(row: dict) -> None:
    """The stored replica equals, bit for bit, the same replica computed afresh here."""
    import numpy as np

    from sweepctl.campaign.plan import ReplicaSpec
    from sweepctl.campaign.worker import compute_replica

    fresh = compute_replica(ReplicaSpec.from_row(row), use_checkpoint=False)
    assert np.asarray(fresh.gamma_strips).tobytes() == np.asarray(row["gamma_strips"]).tobytes()
    assert np.asarray(fresh.exponents).tobytes() == np.asarray(row["exponents"]).tobytes()


@contextlib.contextmanager
def dask_cluster(sched_file: Path, tls: list[str] | None = None, workers: int = 2):
    """A Dask scheduler and workers in subprocesses on 127.0.0.1, via a scheduler file.

    ``tls``: certificate options (``--tls-ca-file … --tls-cert … --tls-key …``) for both.
    """
    tls = tls or []
    proto = ["--protocol", "tls"] if tls else []
    sched = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "distributed.cli.dask_scheduler",
            "--host",
            "127.0.0.1",
            "--port",
            "0",
            "--no-dashboard",
            "--scheduler-file",
            str(sched_file),
            *proto,
            *tls,
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    worker = None
    try:
        wait_until(
            lambda: sched_file.exists() and sched_file.stat().st_size > 0, 60, "the scheduler file"
        )
        worker = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "distributed.cli.dask_worker",
                "--scheduler-file",
                str(sched_file),
                "--nthreads",
                "1",
                "--nworkers",
                str(workers),
                "--host",
                "127.0.0.1",
                "--no-dashboard",
                *tls,
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        yield json.loads(sched_file.read_text())["address"]
    finally:
        for p in (worker, sched):
            if p is not None and p.poll() is None:
                p.terminate()
                try:
                    p.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    p.kill()
