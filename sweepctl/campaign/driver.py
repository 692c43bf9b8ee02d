"""The driver: open the store, connect to Dask, run rounds of replicas, write results.

The driver is the store's single writer. The Dask scheduler keeps no state across
restarts, so resuming is: read the store, replay each point's round decisions from its
complete replica prefixes (:mod:`sweepctl.campaign.progress`), and submit what is
missing. Results stream back and are written in batches; Ctrl-C (or SIGTERM from a
batch system) flushes what has arrived and stops; replicas in flight continue later
from their checkpoints.

A flush is not interrupted by a signal: the signal is noted and acted on when the
flush has finished, and the rows to write are taken out of the buffer before they are
written, so no row can be written twice.
"""

from __future__ import annotations

import contextlib
import importlib.util
import logging
import math
import os
import signal
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from sweepctl.campaign.connect import Connection, RunOptions
from sweepctl.campaign.plan import (
    CostModel,
    Frozen,
    ReplicaSpec,
    check_compatible,
    freeze,
    slice_key,
)
from sweepctl.campaign.progress import (
    GoalRounds,
    PointProgress,
    RunPreview,
    preview_run,
    replica_price,
)
from sweepctl.campaign.recipe import Recipe
from sweepctl.campaign.store import CONVENTIONS, Store, StoreError, code_version

__all__ = [
    "Driver",
    "PreparedCampaign",
    "RunResult",
    "prepare_campaign",
    "run_campaign",
]

log = logging.getLogger("sweepctl")
_MAX_ATTEMPTS = 20  # resubmissions of a replica whose workers keep dying
_WORKER_LOSS = ("KilledWorker", "CommClosedError", "FutureCancelledError")


@dataclass
class RunResult:
    points: int
    done: int
    capped: int
    failed: int
    computed: int
    interrupted: bool
    seconds: float
    #: with a goal on ν: why the campaign stopped (``allocate``'s reason), or None
    goal_reason: str | None = None


def now_iso() -> str:
    return datetime.now(UTC).isoformat(timespec="milliseconds")


@dataclass
class PreparedCampaign:
    """The campaign record a run would write, and what the store held before."""

    campaign: dict
    frozen: Frozen
    previous: tuple[Recipe, Frozen] | None
    exists: bool


def prepare_campaign(
    recipe: Recipe,
    store: Store,
    source: str,
    cost: CostModel | None,
    default_seconds: float | None = None,
) -> PreparedCampaign:
    """Check ``recipe`` against the store and derive the campaign record; writes nothing.

    Refused changes raise :class:`~sweepctl.campaign.recipe.RecipeError` — the same
    message for ``run`` and for ``plan --store``.
    """
    kw = {} if default_seconds is None else {"default_seconds": default_seconds}
    previous = None
    if store.exists():
        campaign = store.read_campaign()
        old = Frozen.from_json(campaign["frozen"])
        check_compatible(recipe, old, source)
        frozen = freeze(recipe, cost, old, source=source, **kw)
        hist = campaign.get("recipe_history") or []
        if hist:
            previous = (Recipe.from_canonical(hist[-1]["recipe"]), old)
    else:
        frozen = freeze(recipe, cost, None, source=source, **kw)
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
    pts = recipe.points()
    campaign["points"] = [p.key for p in pts] if len(pts) <= 20000 else None
    hist = campaign["recipe_history"]
    digest = recipe.digest()
    if not hist or hist[-1]["digest"] != digest:
        hist.append(
            {"digest": digest, "time": now_iso(), "source": source, "recipe": recipe.canonical()}
        )
    return PreparedCampaign(campaign, frozen, previous, store.exists())


class Driver:
    """One run of a campaign: replay, submit, result, error, flush.

    ``report`` receives progress dicts (``kind`` = ``"start"``, ``"progress"``,
    ``"log"``); the caller decides how to show them.
    """

    def __init__(
        self,
        recipe: Recipe,
        store: Store,
        source: str,
        options: RunOptions,
        cost: CostModel | None,
        report: Callable[[dict], None] | None = None,
    ) -> None:
        self.recipe, self.store, self.source = recipe, store, source
        self.options, self.cost = options, cost
        self.say = report or (lambda _m: None)
        self.progress: dict[str, PointProgress] = {}
        #: campaign-wide rounds of a recipe with a goal, else None
        self.goal_rounds: GoalRounds | None = None
        self._replayed: list[dict] = []
        self.frozen: Frozen | None = None
        self._rehearsal = None
        self.meta: dict = {}
        self.conn: Connection | None = None
        self.futures = None
        self.inflight: dict[tuple[str, int], object] = {}
        self.attempts: dict[tuple[str, int], int] = {}
        self.observed: dict[str, list[float]] = {}
        self.computed = 0
        self.failed_points = 0
        self.interrupted = False
        self._events: list[dict] = []
        self._events_lock = threading.Lock()
        self._rows: list[dict] = []
        self._checkpoints: list[Path] = []
        self._last_flush = time.perf_counter()
        self._in_flush = False
        self._closing = False
        self._stop_requested = False
        self._deferring = False

    # -- the run ------------------------------------------------------------------------
    def run(self) -> RunResult:
        t0 = time.perf_counter()
        store = self.store
        if not store.exists():
            if store.foreign_entries():
                raise StoreError(
                    f"{store.root}: directory exists and is not a sweepctl store; "
                    "choose an empty or new directory"
                )
            store.root.mkdir(parents=True, exist_ok=True)
        with store.locked(expiry=self.options.lease_expiry, wait=self.options.lease_wait) as lease:
            removed = store.cleanup()
            preview = self.replay()
            orphans = store.remove_stored_checkpoints(
                {(pp.point.short, r) for pp in self.progress.values() for r in pp.done}
            )
            compacted = self._compact(at_least=self.options.compact_at)
            prev = lease.previous
            store.append_events(
                [
                    {
                        "time": now_iso(),
                        "event": "run-start",
                        "pid": os.getpid(),
                        "host": socket.gethostname(),
                        "lease": lease.generation,
                        "lease_expiry": lease.expiry,
                        "took_over": None
                        if prev is None or prev.released
                        else {"pid": prev.pid, "host": prev.host, "generation": prev.generation},
                        "recipe": self.recipe.digest(),
                        "stored_rows": preview.stored_rows,
                        "removed_temporaries": [str(p) for p in removed],
                        "removed_checkpoints": orphans,
                        "compacted": compacted,
                        "preview": preview.to_json(),
                    }
                ]
            )
            self._log_replayed_decisions()
            todo = [pp for pp in self.progress.values() if not pp.finished]
            self.say(
                {
                    "kind": "start",
                    "points": len(self.progress),
                    "todo": len(todo),
                    "stored_rows": preview.stored_rows,
                    "reopened": len(preview.reopened_points),
                    "new": len(preview.new_points),
                }
            )
            if not todo:
                store.append_events([{"time": now_iso(), "event": "run-end", "computed": 0}])
                return self._result(t0)
            with self._signals():
                try:
                    self._connect()
                    with self._deferring_signals():
                        for pp in todo:
                            self.submit(pp)
                    self._say_progress()
                    for fut in self.futures:
                        # a signal landing inside a Dask client call would unwind through
                        # its event-loop bridge (which logs a spurious traceback): while a
                        # result is handled, signals are held and acted on right after
                        with self._deferring_signals():
                            if fut.status == "error":
                                self.error(fut)
                            else:
                                self.result(fut)
                except KeyboardInterrupt:
                    if self.conn is not None and self.conn.fatal:
                        self.failed_points += 1
                        self.say({"kind": "log", "message": f"stopped: {self.conn.fatal}"})
                        self._event({"event": "failed", "error": self.conn.fatal})
                    else:
                        self.interrupted = True
                        self.say({"kind": "log", "message": "interrupted: saving what has arrived"})
                finally:
                    self._closing = True  # from here on a signal is only noted
                    try:
                        self.flush(final=True)
                        store.append_events(
                            [
                                {
                                    "time": now_iso(),
                                    "event": "interrupted" if self.interrupted else "run-end",
                                    "computed": self.computed,
                                }
                            ]
                        )
                    finally:
                        if self.conn is not None:
                            self.conn.close()
        return self._result(t0)

    def replay(self) -> RunPreview:
        """Write the campaign record and rebuild every point's rounds from stored rows."""
        prep = prepare_campaign(
            self.recipe,
            self.store,
            self.source,
            self.cost,
            self.options.default_replica_seconds,
        )
        if prep.exists:
            self.store.write_campaign(prep.campaign)
        else:
            self.store.create(prep.campaign)
        self.frozen = prep.frozen
        self._rehearsal = prep.frozen.rehearsal()
        self.meta = {
            "name": prep.campaign["name"],
            "entropy": prep.campaign["frozen"]["entropy"],
            "model": prep.frozen.model,
        }
        rows = self.store.read_replicas(columns=["point_key", "replica", "gamma_strips"])
        preview, self.progress = preview_run(self.recipe, prep.frozen, rows, prep.previous)
        self.goal_rounds = None
        self._replayed = []
        if self.recipe.goal is not None:
            # the rounds already decided, again from the stored prefixes
            self.goal_rounds = GoalRounds(self.recipe, prep.frozen, self._price)
            self._replayed = self.goal_rounds.advance(self.progress)
        return preview

    def _price(self, pp: PointProgress) -> float:
        """CPU seconds of one replica of ``pp`` (goal rounds and their budget): the price
        frozen with the store, so decisions depend neither on timing nor on the machine
        a resume runs on; the cost model's for stores made before prices were frozen."""
        v = replica_price(self.frozen, self.cost, pp)
        if v is None:
            raise StoreError(
                "a goal on nu spends its CPU budget by the cost model's prices, which need a "
                "kernel calibration: give --calibration FILE (from `sweepctl bench --out FILE`)"
            )
        return v

    def _log_replayed_decisions(self) -> None:
        """Log the replay's decisions that no earlier run logged (a run cut between its
        decision and its next flush)."""
        if not self._replayed:
            return
        logged = {
            e.get("round") for e in self.store.read_events() if e.get("event") == "allocation"
        }
        new = [{"time": now_iso(), **d} for d in self._replayed if d["round"] not in logged]
        if new:
            self.store.append_events(new)

    def _decide_goal_rounds(self) -> None:
        """After a result: decide the campaign's next round once every prefix is complete."""
        decided = self.goal_rounds.advance(self.progress)
        for d in decided:
            self._event(d)
            hw = ", ".join(
                f"{k}: nu = {d['nu'][k]:.4g} ± {v:.3g}"
                for k, v in d["nu_halfwidth"].items()
                if v is not None and d["nu"].get(k) is not None
            )
            for k, c in d.get("check", {}).items():
                lo, hi = c["nu_ci"]
                said = (
                    f"[{lo:.4g}, {hi:.4g}] (± {c['halfwidth']:.3g})"
                    if lo is not None and hi is not None
                    else "no acceptable form"
                )
                hw += f"; check {k} (sweepctl fit): {said}"
            what = d["reason"] or f"{sum(d['replicas'].values())} replicas wanted"
            self.say({"kind": "log", "message": f"round {d['round']}: {what}; {hw or 'no fit'}"})
        if not decided:
            return
        for pp in self.progress.values():
            if not pp.finished:
                self.submit(pp)
        if (
            decided[-1]["reason"] is None
            and os.environ.get("SWEEPCTL_FAULT") == "signal-after-round"
        ):
            os.kill(os.getpid(), signal.SIGTERM)  # fault-injection hook: stop after a decision

    def _connect(self) -> None:
        from distributed import as_completed

        self.conn = Connection(self.options)
        self.conn.client.subscribe_topic("sweepctl", self._on_worker_event)
        self.conn.on_event = lambda m: self._on_worker_event((None, m))
        # written at once: whoever watches the store learns the worker processes (and the
        # dashboard's address) early
        first = [
            {
                "time": now_iso(),
                "event": "cluster",
                "kind": self.conn.kind,
                "workers": self.conn.worker_pids(),
            }
        ]
        if self.options.dashboard:
            first.append({"time": now_iso(), "event": "dashboard", "address": self.conn.dashboard})
        self.store.append_events(first)
        self.say({"kind": "log", "message": f"connected: {self.conn.kind}"})
        if self.options.dashboard:
            where = self.conn.dashboard or "not served (the scheduler has no HTTP server)"
            if self.conn.dashboard and importlib.util.find_spec("bokeh") is None:
                # Dask serves its health routes without bokeh, but no pages
                where += " (its pages need bokeh: pip install bokeh)"
            self.say({"kind": "log", "message": f"dashboard: {where}"})
        self.futures = as_completed(with_results=False)

    def submit(self, pp: PointProgress) -> None:
        """Submit the replicas of ``pp``'s current round that are neither stored nor running."""
        from sweepctl.campaign.worker import run_replica

        frozen = self.frozen
        for r in pp.missing():
            k = (pp.point.key, r)
            if k in self.inflight:
                continue
            spec = ReplicaSpec(
                point=pp.point,
                replica=r,
                entropy=frozen.entropy,
                layers=pp.layers,
                warmup=pp.warmup,
                strips=frozen.strips,
                checkpoint=str(self.store.checkpoint_path(pp.point.short, r)),
                checkpoint_seconds=self.recipe.checkpoint_seconds,
                model=self._rehearsal,
                virtual_seconds=self._virtual_seconds(pp),
            )
            a = self.attempts.get(k, 0)
            key = spec.key if a == 0 else f"{spec.key}-attempt{a}"
            fut = self.conn.client.submit(run_replica, spec, key=key, pure=False)
            fut.sweepctl = (pp, spec)  # type: ignore[attr-defined]
            self.inflight[k] = fut
            self.futures.add(fut)
            self._event({"event": "submitted", "point": pp.point.key, "replica": r, "key": key})

    def _virtual_seconds(self, pp: PointProgress) -> float | None:
        """A rehearsal replica's price on the network kernel (what its row is charged)."""
        if self._rehearsal is None:
            return None
        # with a goal, the frozen price: the rows are charged what the budget counted
        v = replica_price(self.frozen, self.cost, pp)
        if v is None:
            raise StoreError(
                "a rehearsal campaign charges each replica what the network kernel would "
                "spend, which needs a kernel calibration: give --calibration FILE "
                "(from `sweepctl bench --out FILE`)"
            )
        return v

    def result(self, fut) -> None:
        """A replica came back: buffer its row, advance its point's rounds."""
        pp, spec = fut.sweepctl
        self.inflight.pop((pp.point.key, spec.replica), None)
        out = fut.result()
        fut.release()
        if spec.replica in pp.done:
            return  # a duplicate delivery: keep the first
        self._rows.append(out.row())
        self._checkpoints.append(Path(spec.checkpoint))
        pp.done[spec.replica] = np.asarray(out.gamma_strips)
        self.computed += 1
        for note in out.notes:
            self._event(
                {"event": "note", "point": pp.point.key, "replica": spec.replica, "note": note}
            )
            self.say(
                {"kind": "log", "message": f"{pp.point.label()} replica {spec.replica}: {note}"}
            )
        self._event(
            {
                "event": "finished",
                "point": pp.point.key,
                "replica": spec.replica,
                "worker": out.worker,
                "wall_seconds": out.wall_seconds,
            }
        )
        per = out.wall_seconds / max(1, (spec.layers + spec.warmup) * spec.strips)
        self.observed.setdefault(slice_key(pp.point), []).append(per)
        if self.goal_rounds is not None:
            self._decide_goal_rounds()
        else:
            before = pp.wanted
            pp.decide()
            if pp.wanted > before:
                self.submit(pp)
        if (
            len(self._rows) >= self.options.flush_rows
            or time.perf_counter() - self._last_flush >= self.options.flush_seconds
        ):
            self.flush()
        self._say_progress()

    def error(self, fut) -> None:
        """A replica raised: resubmit after a worker loss, otherwise stop its point."""
        pp, spec = fut.sweepctl
        k = (pp.point.key, spec.replica)
        self.inflight.pop(k, None)
        exc = fut.exception()
        name = type(exc).__name__
        a = self.attempts.get(k, 0) + 1
        self.attempts[k] = a
        self._event(
            {
                "event": "failed",
                "point": pp.point.key,
                "replica": spec.replica,
                "error": f"{name}: {exc}",
                "attempt": a,
            }
        )
        if name in _WORKER_LOSS and a < _MAX_ATTEMPTS:
            self.submit(pp)  # worker loss: continue elsewhere from the checkpoint
            return
        pp.failed = True
        pp.finished = True
        self.failed_points += 1
        self.say(
            {
                "kind": "log",
                "message": f"replica {spec.replica} of {pp.point.label()} failed: {name}: {exc}",
            }
        )

    def flush(self, final: bool = False) -> None:
        """Write buffered rows as one part file, then remove their checkpoints.

        Signals arriving meanwhile are held until the end (see :meth:`_signals`); the
        rows are swapped out of the buffer first, so a flush can never store a row twice.
        """
        self._in_flush = True
        try:
            rows, self._rows = self._rows, []
            cks, self._checkpoints = self._checkpoints, []
            if rows:
                try:
                    self.store.write_replicas(rows, self.meta)
                except BaseException:
                    # write_replicas is atomic: nothing of this batch is stored; keep it
                    self._rows = rows + self._rows
                    self._checkpoints = cks + self._checkpoints
                    raise
                if os.environ.get("SWEEPCTL_FAULT") == "signal-in-flush" and not final:
                    os.kill(os.getpid(), signal.SIGTERM)  # fault-injection hook for tests
                if os.environ.get("SWEEPCTL_FAULT") == "kill-after-rows":
                    os.kill(os.getpid(), signal.SIGKILL)  # rows stored, checkpoints not removed
                for p in cks:
                    with contextlib.suppress(OSError):
                        p.unlink()
            with self._events_lock:
                batch, self._events = self._events, []
            self.store.append_events(batch)
            done = self._compact(at_least=self.options.compact_at)
            if done:
                self.store.append_events([{"time": now_iso(), "event": "compacted", **done}])
            self._last_flush = time.perf_counter()
        finally:
            self._in_flush = False
        if self._stop_requested and not final:
            self._stop_requested = False
            raise KeyboardInterrupt

    # -- helpers ------------------------------------------------------------------------
    def _compact(self, at_least: int) -> dict | None:
        """Compact the small part files once there are ``at_least`` of them."""
        if len(self.store.small_part_files()) < max(2, at_least):
            return None
        read, written = self.store.compact()
        return {"files_read": read, "files_written": written} if read else None

    @contextlib.contextmanager
    def _deferring_signals(self):
        """Hold TERM/INT while the block runs; raise the held stop once it is done."""
        self._deferring = True
        try:
            yield
        finally:
            self._deferring = False
        if self._stop_requested and not self._closing:
            self._stop_requested = False
            raise KeyboardInterrupt

    @contextlib.contextmanager
    def _signals(self):
        """TERM (batch systems send it before KILL) and INT stop the run, but not mid-flush."""

        def on_signal(signum, frame):
            if self._in_flush or self._closing or self._deferring:
                self._stop_requested = True
                return
            raise KeyboardInterrupt

        old = {}
        for sig in (signal.SIGTERM, signal.SIGINT):
            with contextlib.suppress(ValueError):  # not the main thread
                old[sig] = signal.signal(sig, on_signal)
        try:
            yield
        finally:
            for sig, handler in old.items():
                with contextlib.suppress(ValueError, TypeError):
                    signal.signal(sig, handler)

    def _event(self, event: dict) -> None:
        with self._events_lock:
            self._events.append({"time": now_iso(), **event})

    def _on_worker_event(self, event) -> None:
        _, msg = event
        if isinstance(msg, dict):
            self._event(msg)

    def _say_progress(self) -> None:
        vals = self.progress.values()
        self.say(
            {
                "kind": "progress",
                "done": sum(len(pp.done) for pp in vals),
                "total": sum(pp.wanted for pp in vals),
                "computed": self.computed,
                "eta": _eta(
                    self.progress,
                    self.frozen,
                    self.cost,
                    self.observed,
                    self.conn.n_workers() if self.conn else 1,
                ),
            }
        )

    def _result(self, t0: float) -> RunResult:
        vals = list(self.progress.values())
        failed = sum(1 for p in vals if p.failed)
        return RunResult(
            points=len(vals),
            done=sum(1 for p in vals if p.finished and not p.failed),
            capped=sum(1 for p in vals if p.capped),
            failed=failed or self.failed_points,
            computed=self.computed,
            interrupted=self.interrupted,
            seconds=time.perf_counter() - t0,
            goal_reason=None if self.goal_rounds is None else self.goal_rounds.reason,
        )


def run_campaign(
    recipe: Recipe,
    store: Store,
    source: str,
    options: RunOptions,
    cost: CostModel | None,
    report: Callable[[dict], None] | None = None,
) -> RunResult:
    """Run (or continue) a campaign until every point is done or capped."""
    return Driver(recipe, store, source, options, cost, report).run()


def _eta(progress, frozen, cost, observed: dict[str, list[float]], workers) -> float | None:
    """Seconds left for the current rounds.

    Per slice: the seconds per strip-layer observed this run where there are some;
    elsewhere the cost model's price scaled by how the observed slices compare with it
    (the workers need not be the calibrated machine); without a model, the nearest
    observed width scaled as N².
    """
    if not observed and cost is None:
        return None
    mean_obs = {k: float(np.mean(v)) for k, v in observed.items() if v}
    first = {}
    for pp in progress.values():
        first.setdefault(slice_key(pp.point), pp.point)
    ratio = 1.0
    if cost is not None and mean_obs:
        ratios = [v / cost.point_seconds(first[k], frozen.strips) for k, v in mean_obs.items()]
        ratio = float(np.median(ratios))

    def spl(point) -> float:
        k = slice_key(point)
        if k in mean_obs:
            return mean_obs[k]
        if cost is not None:
            return ratio * cost.point_seconds(point, frozen.strips)
        near = min(mean_obs, key=lambda q: abs(first[q].width - point.width))
        return mean_obs[near] * (point.width / first[near].width) ** 2

    secs = 0.0
    for pp in progress.values():
        if pp.finished:
            continue
        secs += len(pp.missing()) * (pp.layers + pp.warmup) * frozen.strips * spl(pp.point)
    return secs / max(1, workers) if math.isfinite(secs) else None
