"""Self-continuing allocations: a campaign that resubmits itself until it is complete.

``sweepctl cluster submit`` writes a job script for the profile's batch system into
``STORE/allocations/`` and submits it. Each allocation (a *link* of the chain) runs the
whole campaign machinery inside itself — a Dask scheduler and single-threaded workers on
the allocated node, and the driver — until ``stop_margin`` before its walltime; then the
driver stores what has arrived and stops, and the link submits its successor. A link
that finds the campaign complete ends the chain. Replicas in flight at a stop continue
in the next link from their checkpoints, bit-identically.

The chain stops instead of looping when two links in a row stored no new replica (a
broken set-up would otherwise burn allocations forever), when a replica fails, when
another driver holds the store, or when ``sweepctl cluster stop`` left its marker.

``STORE/allocations/``::

    chain.json    the batch system, profile settings and stop margin the links use
    recipe.toml   the recipe the chain runs (copied at submission)
    link.sh       the job script (resubmitted as it is by every link)
    links.jsonl   one line per submission, link start and link end (rows stored, outcome)
    stop          present after ``sweepctl cluster stop``: no link starts or continues
    *.out, *.err  the links' output (as the batch system names it)
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shlex
import signal
import socket
import subprocess
import threading
import time
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path

from sweepctl.cluster.batch import Profile, ProfileError, _classes, _job_kwargs, parse_duration
from sweepctl.errors import SweepctlError

__all__ = [
    "ChainConfig",
    "chain_dir",
    "link_script",
    "read_links",
    "run_link",
    "stop_chain",
    "submit_chain",
]

#: What each batch system calls the submit and cancel commands and the job id variable.
SYSTEM = {
    "slurm": {"submit": ["sbatch", "--parsable"], "cancel": ["scancel"], "env": "SLURM_JOB_ID"},
    "pbs": {"submit": ["qsub"], "cancel": ["qdel"], "env": "PBS_JOBID"},
    "sge": {"submit": ["qsub", "-terse"], "cancel": ["qdel"], "env": "JOB_ID"},
    "lsf": {"submit": ["bsub"], "cancel": ["bkill"], "env": "LSB_JOBID"},
}
#: Links in a row that stored no new replica before the chain stops.
NO_PROGRESS_LINKS = 2


class ChainError(SweepctlError):
    """The chain cannot be submitted or continued (the message says why)."""


@dataclass
class ChainConfig:
    """What every link of a chain needs (``STORE/allocations/chain.json``)."""

    system: str
    profile: str
    walltime_seconds: int
    stop_margin_seconds: int
    workers: int
    lease_expiry_seconds: float | None
    replica_seconds: float
    created: str
    dashboard: str | None = None  # HOST:PORT of each link's Dask dashboard (opt-in)

    @classmethod
    def read(cls, store_root: Path) -> ChainConfig:
        f = chain_dir(store_root) / "chain.json"
        try:
            return cls(**json.loads(f.read_text()))
        except (OSError, ValueError, TypeError) as exc:
            raise ChainError(
                f"{f}: no readable chain settings ({exc}); submit with `sweepctl cluster submit`"
            ) from None


def chain_dir(store_root: Path) -> Path:
    return Path(store_root) / "allocations"


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _append(store_root: Path, record: dict) -> None:
    """One line of ``links.jsonl`` (only one link runs at a time; lines are short)."""
    line = json.dumps({"time": _now(), **record}, sort_keys=True) + "\n"
    with open(chain_dir(store_root) / "links.jsonl", "a", encoding="utf-8") as fh:
        fh.write(line)
        fh.flush()
        os.fsync(fh.fileno())


def read_links(store_root: Path) -> list[dict]:
    """The chain's record: submissions, link starts and ends, oldest first."""
    f = chain_dir(store_root) / "links.jsonl"
    out = []
    with contextlib.suppress(OSError):
        for line in f.read_text().splitlines():
            with contextlib.suppress(ValueError):
                out.append(json.loads(line))
    return out


def stop_margin_seconds(p: Profile, text: str | None) -> int:
    """How long before the walltime a link stops: ``--stop-margin``, the profile's
    ``stop_margin``, else 5 minutes (at most a quarter of the walltime)."""
    wall = p.walltime_seconds
    if text is None:
        text = p.stop_margin
    if text is None:
        return min(300, max(10, wall // 4))
    m = parse_duration(text, "--stop-margin")
    if not 0 < m < wall:
        raise ProfileError(
            f"--stop-margin = {text!r}: must be positive and shorter than the walltime "
            f"({p.walltime}); e.g. --stop-margin 5m"
        )
    return m


def link_script(p: Profile, store_root: Path, python: str | None = None) -> str:
    """The job script of one link: the profile's directives, its prologue, then
    ``sweepctl cluster link`` (exec'd, so the batch system's TERM reaches it)."""
    store_root = Path(store_root).resolve()
    _, job_cls = _classes(p.system)
    kw = _job_kwargs(p)
    kw.pop("interface", None)
    kw["processes"] = 1  # the header asks for the cores; the link starts its own workers
    kw["job_name"] = f"sweepctl-chain-{p.name}"
    kw["log_directory"] = str(chain_dir(store_root))
    header = job_cls(scheduler="tls://127.0.0.1:1", **kw).job_header
    py = python or p.python or "python3"
    lines = [
        "#!/usr/bin/env bash",
        header,
        "",
        "# One link of a self-continuing sweepctl campaign (written by `sweepctl cluster",
        "# submit`): scheduler, workers and driver run in this allocation until shortly",
        "# before the walltime; then the link stores what it has and submits its successor.",
        "set -eu",
        *p.prologue,
        f"exec {py} -m sweepctl cluster link {shlex.quote(str(store_root))}",
        "",
    ]
    return "\n".join(lines)


def _job_id(system: str, out: str) -> str:
    out = out.strip()
    if system == "lsf":
        m = re.search(r"Job <(\d+)>", out)
        if not m:
            raise ChainError(f"bsub answered {out!r}: no job id in it")
        return m.group(1)
    if system == "slurm":  # "123" or "123;cluster" (--parsable)
        m = re.search(r"\d+", out)
        return m.group(0) if m else ""
    return out.splitlines()[-1].strip() if out else ""


def _submit(system: str, script: Path) -> str:
    cmd = [*SYSTEM[system]["submit"]] + ([] if system == "lsf" else [str(script)])
    try:
        proc = subprocess.run(
            cmd,
            capture_output=True,
            text=True,
            timeout=120,
            input=script.read_text() if system == "lsf" else "",  # bsub reads stdin
        )
    except (OSError, subprocess.SubprocessError) as exc:
        raise ChainError(f"{' '.join(cmd)} failed: {exc}") from None
    if proc.returncode != 0:
        raise ChainError(
            f"{' '.join(cmd)} failed (exit {proc.returncode}): "
            f"{(proc.stderr or proc.stdout).strip()[:400]}"
        )
    jid = _job_id(system, proc.stdout)
    if not jid:
        raise ChainError(f"{' '.join(cmd)} printed no job id: {proc.stdout!r}")
    return jid


def submit_chain(
    recipe_path: Path,
    store_root: Path,
    p: Profile,
    stop_margin: str | None = None,
    lease_expiry: float | None = None,
    python: str | None = None,
    dashboard: str | None = None,
) -> str:
    """Write ``STORE/allocations/`` and submit the first link; returns its job id."""
    from sweepctl.campaign.store import atomic_write_bytes

    store_root = Path(store_root).resolve()
    margin = stop_margin_seconds(p, stop_margin)  # refused before anything is written
    d = chain_dir(store_root)
    d.mkdir(parents=True, exist_ok=True)
    cfg = ChainConfig(
        system=p.system,
        profile=p.name,
        walltime_seconds=p.walltime_seconds,
        stop_margin_seconds=margin,
        workers=p.processes,
        lease_expiry_seconds=lease_expiry,
        replica_seconds=p.replica_seconds(),
        created=_now(),
        dashboard=dashboard,
    )
    atomic_write_bytes(d / "recipe.toml", Path(recipe_path).read_bytes())
    atomic_write_bytes(d / "chain.json", (json.dumps(asdict(cfg), indent=2) + "\n").encode())
    script = d / "link.sh"
    atomic_write_bytes(script, link_script(p, store_root, python).encode())
    script.chmod(0o755)
    (d / "stop").unlink(missing_ok=True)
    jid = _submit(p.system, script)
    _append(store_root, {"event": "submitted", "job": jid, "by": "sweepctl cluster submit"})
    return jid


def _open_jobs(links: list[dict]) -> list[str]:
    """Jobs of the chain submitted and not yet ended (by the chain's own record)."""
    submitted = [r["job"] for r in links if r.get("event") == "submitted"]
    submitted += [r["successor"] for r in links if r.get("successor")]
    ended = {r["job"] for r in links if r.get("event") == "link-end"}
    return [j for j in dict.fromkeys(submitted) if j not in ended]


def chain_summary(store_root: Path) -> dict | None:
    """The chain's state for ``status``: its last record and how many links ran."""
    links = read_links(store_root)
    if not links:
        return None
    starts = [r for r in links if r.get("event") == "link-start"]
    stopped = (chain_dir(store_root) / "stop").exists()
    return {"links": len(starts), "last": links[-1], "stop_requested": stopped}


def stop_chain(store_root: Path, cancel: bool = True) -> dict:
    """Leave the stop marker (no link continues the chain) and, with ``cancel``, cancel
    the chain's queued and running links (a running driver stores what it has)."""
    d = chain_dir(store_root)
    if not (d / "chain.json").exists():
        raise ChainError(f"{store_root}: no chain of allocations here (no {d / 'chain.json'})")
    cfg = ChainConfig.read(store_root)
    (d / "stop").write_text(_now() + "\n")
    jobs = _open_jobs(read_links(store_root)) if cancel else []
    cancelled = []
    for j in jobs:
        with contextlib.suppress(OSError, subprocess.SubprocessError):
            proc = subprocess.run(
                [*SYSTEM[cfg.system]["cancel"], j], capture_output=True, text=True, timeout=60
            )
            if proc.returncode == 0:
                cancelled.append(j)
    _append(store_root, {"event": "stop-requested", "cancelled": cancelled})
    return {"cancelled": cancelled, "open": jobs}


def _stored_rows(store) -> int:
    if not store.exists():
        return 0
    return store.read_replicas(columns=["point_key", "replica"]).num_rows


def run_link(store_root: Path, cost, report=None) -> tuple[str, int]:
    """One link, inside its allocation: check, run the driver until the stop margin,
    submit the successor. Returns ``(outcome, exit code)``."""
    from sweepctl.campaign.connect import RunOptions
    from sweepctl.campaign.driver import run_campaign
    from sweepctl.campaign.recipe import load_recipe
    from sweepctl.campaign.store import Store, StoreLocked

    t0 = time.monotonic()
    store_root = Path(store_root).resolve()
    cfg = ChainConfig.read(store_root)
    d = chain_dir(store_root)
    job = os.environ.get(SYSTEM[cfg.system]["env"], "local")
    store = Store(store_root)
    rows = _stored_rows(store)
    _append(
        store_root, {"event": "link-start", "job": job, "host": socket.gethostname(), "rows": rows}
    )

    def end(outcome: str, code: int, **extra) -> tuple[str, int]:
        _append(
            store_root,
            {
                "event": "link-end",
                "job": job,
                "outcome": outcome,
                "rows": _stored_rows(store),
                **extra,
            },
        )
        return outcome, code

    if (d / "stop").exists():
        return end("stopped", 0)
    starts = [r["rows"] for r in read_links(store_root) if r.get("event") == "link-start"]
    if len(starts) > NO_PROGRESS_LINKS and len(set(starts[-NO_PROGRESS_LINKS - 1 :])) == 1:
        return end(
            "no-progress",
            1,
            message=f"the last {NO_PROGRESS_LINKS} links stored no new replica; read their "
            f"output in {d} and the events log, fix the cause, then submit again",
        )
    recipe = load_recipe(d / "recipe.toml")
    opts = RunOptions(
        workers=cfg.workers,
        lease_expiry=cfg.lease_expiry_seconds,
        default_replica_seconds=cfg.replica_seconds,
        dashboard=cfg.dashboard,
    )
    # a lease left by a link that died without its clean-up expires within its expiry
    from sweepctl.campaign.store import LEASE_EXPIRY_SECONDS

    opts.lease_wait = min(
        (cfg.lease_expiry_seconds or LEASE_EXPIRY_SECONDS) + 5,
        max(0.0, cfg.walltime_seconds - cfg.stop_margin_seconds - 60),
    )
    left = cfg.walltime_seconds - cfg.stop_margin_seconds - (time.monotonic() - t0)
    timer = threading.Timer(max(1.0, left), lambda: os.kill(os.getpid(), signal.SIGTERM))
    timer.daemon = True
    timer.start()
    try:
        res = run_campaign(recipe, store, str(d / "recipe.toml"), opts, cost, report)
    except StoreLocked as exc:
        return end("store-busy", 2, message=str(exc))
    finally:
        timer.cancel()
    if res.failed:
        return end("failed", 1, message=f"{res.failed} points failed; see the events log")
    if not res.interrupted:
        return end("complete", 0, computed=res.computed)
    if (d / "stop").exists():
        return end("stopped", 0, computed=res.computed)
    try:
        successor = _submit(cfg.system, d / "link.sh")
    except ChainError as exc:
        return end("submit-failed", 1, computed=res.computed, message=str(exc))
    return end("continued", 0, computed=res.computed, successor=successor)
