"""Connection to Dask: the embedded local cluster, an existing scheduler, or a batch cluster.

Worker settings chosen here (see DEVELOPERS.md, "Campaign mechanics") keep the GIL free
for compute-bound replicas; none of them changes a result.
"""

from __future__ import annotations

import contextlib
import logging
import os
import threading
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass

__all__ = ["Connection", "RunOptions", "cores"]


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
    lease_expiry: float | None = None  # seconds; None: store.LEASE_EXPIRY_SECONDS
    lease_wait: float = 0.0  # seconds to wait for another driver's lease to end or expire
    dashboard: str | None = None  # "HOST:PORT" to serve the Dask dashboard on (opt-in)
    compact_at: int = 64  # compact part files once this many small ones exist


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
            n = options.workers or cores()
            self.cluster = LocalCluster(
                n_workers=n,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                # always served (health routes); without --dashboard on a free port
                dashboard_address=options.dashboard or "127.0.0.1:0",
                silence_logs=logging.ERROR,
            )
            self.client = Client(self.cluster)
            self.kind = f"local cluster, {n} worker processes"
        self.dashboard: str | None = None
        if options.dashboard:
            self.dashboard = dashboard_address(self.client)

    #: callback for watchdog reports (set by the driver)
    on_event: Callable[[dict], None] | None = None
    #: why the watchdog stopped the run, if it did
    fatal: str | None = None

    def _watchdog(self) -> None:
        """Poll the batch system (at most every ``sweepctl_poll_seconds``, one query for
        all jobs) and forget jobs that ended behind dask-jobqueue's back.

        The batch layer attaches ``sweepctl_prune`` (a function of no arguments that
        drops ended jobs and returns their ids, or ``None`` when the batch system did
        not answer) to the clusters it makes; the driver only calls it, so this layer
        never imports the batch layer.
        """
        prune = getattr(self.cluster, "sweepctl_prune", None)
        every = float(getattr(self.cluster, "sweepctl_poll_seconds", 30.0))
        ever_connected = False
        ended_unconnected = 0
        unknown_since = None
        while prune is not None and not self._watch.wait(every):
            with contextlib.suppress(Exception):
                ever_connected |= bool(self.client.scheduler_info().get("workers"))
                dropped = self.cluster.sync(_call, prune)
                if dropped is None:  # no answer: the jobs are unknown, not dead
                    if unknown_since is None and self.on_event:
                        self.on_event({"event": "jobs-unknown", "jobs": self._job_ids()})
                    unknown_since = unknown_since or time.monotonic()
                    continue
                if unknown_since is not None and self.on_event:
                    self.on_event({"event": "jobs-known-again"})
                unknown_since = None
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

    def _job_ids(self) -> list[str]:
        return [
            str(j.job_id)
            for j in list(getattr(self.cluster, "workers", {}).values())
            if getattr(j, "job_id", None)
        ]

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


def dashboard_address(client) -> str | None:
    """The scheduler's HTTP address (its dashboard), from the scheduler itself."""
    with contextlib.suppress(Exception):
        info = client.scheduler_info()
        port = info.get("services", {}).get("dashboard")
        if port:
            host = info["address"].split("://", 1)[-1].rsplit(":", 1)[0]
            return f"http://{host}:{port}/"
    return None


async def _call(fn, *args):
    """Run ``fn`` on the cluster's event loop (its dicts are not thread-safe)."""
    return fn(*args)


def cores() -> int:
    """Cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover
        return max(1, os.cpu_count() or 1)
