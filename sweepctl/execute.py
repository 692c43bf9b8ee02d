"""The driver: open the store, connect to Dask, run rounds of replicas, write results.

The driver is the store's single writer. The Dask scheduler keeps no state across
restarts, so resuming is: read the store, replay each point's round decisions from its
complete replica prefixes, and submit what is missing. Results stream back and are
written in batches; Ctrl-C (or SIGTERM from a batch system) flushes what has arrived
and stops; replicas in flight continue later from their checkpoints.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import signal
import threading
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from sweepctl.plan import (
    CostModel,
    Frozen,
    ReplicaSpec,
    check_compatible,
    freeze,
    next_target,
    relative_error,
)
from sweepctl.recipe import Point, Recipe
from sweepctl.store import CONVENTIONS, Store, StoreError, code_version

__all__ = [
    "Connection",
    "PointProgress",
    "RunOptions",
    "RunResult",
    "open_campaign",
    "run_campaign",
]

log = logging.getLogger("sweepctl")
_MAX_ATTEMPTS = 20  # resubmissions of a replica whose workers keep dying


@dataclass
class RunOptions:
    """How to run (none of it changes results)."""

    workers: int | None = None
    scheduler: str | None = None
    scheduler_file: str | None = None
    flush_seconds: float = 5.0
    flush_rows: int = 500
    cluster_factory: Callable[[], object] | None = None  # batch-system clusters
    security: object | None = None  # distributed.Security for TLS clusters
    default_replica_seconds: float | None = None  # from a batch profile's walltime


@dataclass
class RunResult:
    points: int
    done: int
    capped: int
    failed: int
    computed: int
    interrupted: bool
    seconds: float


def now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds")


def open_campaign(
    recipe: Recipe,
    store: Store,
    source: str,
    cost: CostModel | None,
    default_seconds: float | None = None,
) -> tuple[dict, Frozen]:
    """Create the store or check the recipe against it; returns (campaign, frozen).

    Must be called with the store's lock held. Nothing is written if the recipe is
    refused.
    """
    kw = {} if default_seconds is None else {"default_seconds": default_seconds}
    if store.exists():
        campaign = store.read_campaign()
        frozen = Frozen.from_json(campaign["frozen"])
        check_compatible(recipe, frozen, source)
        frozen = freeze(recipe, cost, frozen, **kw)
    else:
        frozen = freeze(recipe, cost, None, **kw)
        campaign = {
            "format": 1,
            "name": recipe.name,
            "created": now_iso(),
            "conventions": CONVENTIONS,
            "code_at_creation": code_version(),
            "recipe_history": [],
        }
    campaign["frozen"] = frozen.to_json()
    campaign["target"] = recipe.target
    campaign["initial"] = recipe.initial
    campaign["checkpoint_seconds"] = recipe.checkpoint_seconds
    campaign["points"] = [p.key for p in recipe.points()] if len(recipe.points()) <= 20000 else None
    hist = campaign["recipe_history"]
    digest = recipe.digest()
    if not hist or hist[-1]["digest"] != digest:
        hist.append(
            {"digest": digest, "time": now_iso(), "source": source, "recipe": recipe.canonical()}
        )
    if store.exists():
        store.write_campaign(campaign)
    else:
        store.create(campaign)
    return campaign, frozen


@dataclass
class PointProgress:
    """Round bookkeeping of one point."""

    point: Point
    layers: int
    warmup: int
    max_replicas: int
    target: float
    done: dict[int, np.ndarray] = field(default_factory=dict)
    wanted: int = 0
    finished: bool = False
    failed: bool = False

    def prefix_complete(self) -> bool:
        return all(r in self.done for r in range(self.wanted))

    def decide(self) -> None:
        """Advance the round structure as far as complete prefixes allow."""
        while not self.finished and self.prefix_complete():
            nt = next_target(
                [self.done[r] for r in range(self.wanted)], self.target, self.max_replicas
            )
            if nt <= self.wanted:
                self.finished = True
            else:
                self.wanted = nt

    def rel_err(self) -> float:
        if not self.done:
            return math.inf
        return relative_error(np.concatenate([self.done[r] for r in sorted(self.done)]))

    @property
    def reached(self) -> bool:
        return self.rel_err() <= self.target

    @property
    def capped(self) -> bool:
        return self.finished and not self.failed and not self.reached


def build_progress(recipe: Recipe, frozen: Frozen, rows) -> dict[str, PointProgress]:
    """Per-point progress from the recipe and the rows already stored."""
    by_key: dict[str, PointProgress] = {}
    for p in recipe.points():
        pp = PointProgress(
            point=p,
            layers=frozen.replica_layers[p.width],
            warmup=frozen.warmup_for(p.width),
            max_replicas=frozen.max_replicas(p.width),
            target=recipe.target,
            wanted=min(recipe.initial, frozen.max_replicas(p.width)),
        )
        by_key[p.key] = pp
    if rows is not None and rows.num_rows:
        keys = rows.column("point_key").to_pylist()
        reps = rows.column("replica").to_pylist()
        gams = rows.column("gamma_strips").to_pylist()
        for k, r, g in zip(keys, reps, gams, strict=True):
            if k in by_key:
                by_key[k].done[int(r)] = np.asarray(g, dtype=float)
    for pp in by_key.values():
        pp.decide()
    return by_key


class Connection:
    """A Dask client on the embedded local cluster or an existing one."""

    def __init__(self, options: RunOptions) -> None:
        import dask
        from distributed import Client, LocalCluster

        dask.config.set(
            {
                "distributed.scheduler.allowed-failures": 10,
                "distributed.admin.tick.limit": "60s",
                "distributed.admin.tick.interval": "500ms",  # default 20 ms: GIL wake-ups
                # The workers' sampling profiler takes the GIL every 10 ms from a
                # compute-bound task; sweepctl has no use for it.
                "distributed.worker.profile.enabled": False,
                # Likewise the workers' memory and system monitors (psutil, every 100 and
                # 500 ms by default): measured 5-10 % of a compute-bound task here.
                "distributed.worker.memory.monitor-interval": "2s",
                "distributed.admin.system-monitor.interval": "5s",
            }
        )
        # The scheduler's small HTTP server (health routes; loopback here) falls back to a
        # free port when 8787 is taken by another campaign: not worth a warning.
        warnings.filterwarnings("ignore", message="Port .* is already in use", category=UserWarning)
        self.cluster = None
        sec = {"security": options.security} if options.security is not None else {}
        if options.scheduler_file:
            self.client = Client(scheduler_file=options.scheduler_file, timeout="60s", **sec)
            self.kind = f"scheduler-file {options.scheduler_file}"
        elif options.scheduler:
            self.client = Client(options.scheduler, timeout="60s", **sec)
            self.kind = f"scheduler {options.scheduler}"
        elif options.cluster_factory is not None:
            self.cluster = options.cluster_factory()
            self._watch = threading.Event()
            threading.Thread(target=self._watchdog, daemon=True, name="sweepctl-jobs").start()
            self.client = Client(self.cluster, security=getattr(self.cluster, "security", None))
            self.kind = f"{type(self.cluster).__name__} (TLS, adaptive)"
        else:
            n = options.workers or _cores()
            self.cluster = LocalCluster(
                n_workers=n,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                silence_logs=logging.ERROR,
            )
            self.client = Client(self.cluster)
            self.kind = f"local cluster, {n} worker processes"

    #: callback for watchdog reports (set by the driver)
    on_event: Callable[[dict], None] | None = None
    #: why the watchdog stopped the run, if it did
    fatal: str | None = None

    def _watchdog(self) -> None:
        """Every 10 s, forget batch jobs that ended behind dask-jobqueue's back."""
        from sweepctl.cluster import prune_dead_jobs

        system = getattr(self.cluster, "sweepctl_system", None)
        ever_connected = False
        ended_unconnected = 0
        while system and not self._watch.wait(10.0):
            with contextlib.suppress(Exception):
                ever_connected |= bool(self.client.scheduler_info().get("workers"))
                dropped = self.cluster.sync(_call, prune_dead_jobs, self.cluster, system)
                if dropped and self.on_event:
                    self.on_event({"event": "jobs-ended", "jobs": dropped})
                if not ever_connected:
                    ended_unconnected += len(dropped)
                if ended_unconnected >= 5:
                    # A broken profile would otherwise submit jobs forever.
                    self.fatal = (
                        f"{ended_unconnected} worker jobs ended before any worker connected; "
                        "read the job logs in STORE/batch-logs/ and fix the profile "
                        "(prologue, python, interface)"
                    )
                    import _thread

                    _thread.interrupt_main()
                    return

    def worker_pids(self) -> dict[str, list[int]]:
        """``{address: [pid, parent pid]}`` of every worker (for the events log)."""
        with contextlib.suppress(Exception):
            return self.client.run(lambda: [os.getpid(), os.getppid()])
        return {}

    def n_workers(self) -> int:
        with contextlib.suppress(Exception):
            return max(1, len(self.client.scheduler_info().get("workers", {})))
        return 1

    def close(self) -> None:
        if getattr(self, "_watch", None) is not None:
            self._watch.set()
        with contextlib.suppress(Exception):
            self.client.close(timeout=10)
        if self.cluster is not None:
            with contextlib.suppress(Exception):
                self.cluster.close(timeout=20)


async def _call(fn, *args):
    """Run ``fn`` on the cluster's event loop (its dicts are not thread-safe)."""
    return fn(*args)


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover
        return max(1, os.cpu_count() or 1)


class _Stop(Exception):
    pass


def run_campaign(
    recipe: Recipe,
    store: Store,
    source: str,
    options: RunOptions,
    cost: CostModel | None,
    report: Callable[[dict], None] | None = None,
) -> RunResult:
    """Run (or continue) a campaign until every point is done or capped.

    ``report`` receives progress dicts (``kind`` = ``"start"``, ``"progress"``,
    ``"log"``, ``"end"``); the caller decides how to show them.
    """
    t0 = time.perf_counter()
    say = report or (lambda _m: None)
    if not store.exists():
        if store.foreign_entries():
            raise StoreError(
                f"{store.root}: directory exists and is not a sweepctl store; "
                "choose an empty or new directory"
            )
        store.root.mkdir(parents=True, exist_ok=True)
    with store.locked():
        removed = store.cleanup()
        campaign, frozen = open_campaign(
            recipe, store, source, cost, options.default_replica_seconds
        )
        meta = {"name": campaign["name"], "entropy": campaign["frozen"]["entropy"]}
        rows = store.read_replicas(columns=["point_key", "replica", "gamma_strips"])
        progress = build_progress(recipe, frozen, rows)
        stored_before = rows.num_rows
        events: list[dict] = [
            {
                "time": now_iso(),
                "event": "run-start",
                "pid": os.getpid(),
                "recipe": recipe.digest(),
                "stored_rows": stored_before,
                "removed_temporaries": [str(p) for p in removed],
            }
        ]
        store.append_events(events)
        events = []
        lock = threading.Lock()

        def on_worker_event(event) -> None:
            _, msg = event
            if isinstance(msg, dict):
                with lock:
                    events.append({"time": now_iso(), **msg})

        pending_rows: list[dict] = []
        written_ck: list[Path] = []
        computed = 0
        failed_points = 0
        interrupted = False
        last_flush = time.perf_counter()

        def flush() -> None:
            nonlocal last_flush
            if pending_rows:
                store.write_replicas(pending_rows, meta)
                for p in written_ck:
                    with contextlib.suppress(OSError):
                        p.unlink()
                pending_rows.clear()
                written_ck.clear()
            with lock:
                batch = list(events)
                events.clear()
            store.append_events(batch)
            last_flush = time.perf_counter()

        todo = [pp for pp in progress.values() if not pp.finished]
        say(
            {
                "kind": "start",
                "points": len(progress),
                "todo": len(todo),
                "stored_rows": stored_before,
            }
        )
        if not todo:
            store.append_events([{"time": now_iso(), "event": "run-end", "computed": 0}])
            return _result(progress, 0, False, t0)

        old_term = signal.getsignal(signal.SIGTERM)

        def on_term(signum, frame):  # batch systems send TERM before KILL
            raise KeyboardInterrupt

        with contextlib.suppress(ValueError):
            signal.signal(signal.SIGTERM, on_term)
        conn = None
        try:
            conn = Connection(options)
            conn.client.subscribe_topic("sweepctl", on_worker_event)
            conn.on_event = lambda m: on_worker_event((None, m))
            pids = conn.worker_pids()
            store.append_events(
                [{"time": now_iso(), "event": "cluster", "kind": conn.kind, "workers": pids}]
            )
            say({"kind": "log", "message": f"connected: {conn.kind}"})
            from distributed import as_completed

            futures = as_completed(with_results=False)
            attempts: dict[tuple[str, int], int] = {}
            inflight: dict[tuple[str, int], object] = {}

            def submit(pp: PointProgress) -> None:
                for r in range(pp.wanted):
                    k = (pp.point.key, r)
                    if r in pp.done or k in inflight:
                        continue
                    spec = ReplicaSpec(
                        point=pp.point,
                        replica=r,
                        entropy=frozen.entropy,
                        layers=pp.layers,
                        warmup=pp.warmup,
                        strips=frozen.strips,
                        checkpoint=str(store.checkpoint_path(pp.point.short, r)),
                        checkpoint_seconds=recipe.checkpoint_seconds,
                    )
                    a = attempts.get(k, 0)
                    key = spec.key if a == 0 else f"{spec.key}-attempt{a}"
                    from sweepctl.worker import run_replica

                    fut = conn.client.submit(run_replica, spec, key=key, pure=False)
                    fut.sweepctl = (pp, spec)  # type: ignore[attr-defined]
                    inflight[k] = fut
                    futures.add(fut)
                    with lock:
                        events.append(
                            {
                                "time": now_iso(),
                                "event": "submitted",
                                "point": pp.point.key,
                                "replica": r,
                                "key": key,
                            }
                        )

            for pp in todo:
                submit(pp)
            total_wanted = lambda: sum(pp.wanted for pp in progress.values())  # noqa: E731
            done_count = lambda: sum(len(pp.done) for pp in progress.values())  # noqa: E731
            say(
                {
                    "kind": "progress",
                    "done": done_count(),
                    "total": total_wanted(),
                    "computed": 0,
                    "eta": None,
                }
            )
            observed: dict[int, list[float]] = {}
            for fut in futures:
                pp, spec = fut.sweepctl
                k = (pp.point.key, spec.replica)
                inflight.pop(k, None)
                if fut.status == "error":
                    exc = fut.exception()
                    name = type(exc).__name__
                    a = attempts.get(k, 0) + 1
                    attempts[k] = a
                    with lock:
                        events.append(
                            {
                                "time": now_iso(),
                                "event": "failed",
                                "point": pp.point.key,
                                "replica": spec.replica,
                                "error": f"{name}: {exc}",
                                "attempt": a,
                            }
                        )
                    if (
                        name in ("KilledWorker", "CommClosedError", "FutureCancelledError")
                        and a < _MAX_ATTEMPTS
                    ):
                        submit(pp)  # worker loss: continue elsewhere from the checkpoint
                    else:
                        pp.failed = True
                        pp.finished = True
                        failed_points += 1
                        say(
                            {
                                "kind": "log",
                                "message": (
                                    f"replica {spec.replica} of {pp.point.label()} failed: "
                                    f"{name}: {exc}"
                                ),
                            }
                        )
                    continue
                out = fut.result()
                fut.release()
                if spec.replica in pp.done:
                    continue  # a duplicate delivery: keep the first
                row = out.row()
                pending_rows.append(row)
                written_ck.append(Path(spec.checkpoint))
                pp.done[spec.replica] = np.asarray(out.gamma_strips)
                computed += 1
                with lock:
                    events.append(
                        {
                            "time": now_iso(),
                            "event": "finished",
                            "point": pp.point.key,
                            "replica": spec.replica,
                            "worker": out.worker,
                            "wall_seconds": out.wall_seconds,
                        }
                    )
                per = out.wall_seconds / max(1, (spec.layers + spec.warmup) * spec.strips)
                observed.setdefault(pp.point.width, []).append(per)
                before = pp.wanted
                pp.decide()
                if pp.wanted > before:
                    submit(pp)
                if (
                    len(pending_rows) >= options.flush_rows
                    or time.perf_counter() - last_flush >= options.flush_seconds
                ):
                    flush()
                say(
                    {
                        "kind": "progress",
                        "done": done_count(),
                        "total": total_wanted(),
                        "computed": computed,
                        "eta": _eta(progress, frozen, cost, observed, conn.n_workers()),
                    }
                )
        except KeyboardInterrupt:
            if conn is not None and conn.fatal:
                failed_points += 1
                say({"kind": "log", "message": f"stopped: {conn.fatal}"})
                store.append_events([{"time": now_iso(), "event": "failed", "error": conn.fatal}])
            else:
                interrupted = True
                say({"kind": "log", "message": "interrupted: saving what has arrived"})
        finally:
            flush()
            store.append_events(
                [
                    {
                        "time": now_iso(),
                        "event": "interrupted" if interrupted else "run-end",
                        "computed": computed,
                    }
                ]
            )
            if conn is not None:
                conn.close()
            with contextlib.suppress(ValueError, TypeError):
                signal.signal(signal.SIGTERM, old_term)
        res = _result(progress, computed, interrupted, t0)
        if failed_points and not res.failed:
            res.failed = failed_points
        return res


def _eta(progress, frozen, cost, observed: dict[int, list[float]], workers) -> float | None:
    """Seconds left for the current rounds: observed seconds per strip-layer per width
    (the calibration, or another width scaled as N², where none is observed yet)."""
    if not observed and cost is None:
        return None
    mean_obs = {n: float(np.mean(v)) for n, v in observed.items() if v}

    def spl(n: int) -> float:
        if n in mean_obs:
            return mean_obs[n]
        if cost is not None:
            return cost.seconds_per_strip_layer(n)
        m, v = min(mean_obs.items(), key=lambda kv: abs(kv[0] - n))
        return v * (n / m) ** 2

    secs = 0.0
    for pp in progress.values():
        if pp.finished:
            continue
        missing = pp.wanted - len(pp.done)
        secs += missing * (pp.layers + pp.warmup) * frozen.strips * spl(pp.point.width)
    return secs / max(1, workers)


def _result(progress, computed, interrupted, t0) -> RunResult:
    vals = list(progress.values())
    return RunResult(
        points=len(vals),
        done=sum(1 for p in vals if p.finished and not p.failed),
        capped=sum(1 for p in vals if p.capped),
        failed=sum(1 for p in vals if p.failed),
        computed=computed,
        interrupted=interrupted,
        seconds=time.perf_counter() - t0,
    )
