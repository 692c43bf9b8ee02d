"""The unit of work: compute one replica, checkpointing as it goes.

Runs inside Dask worker processes (and in ``audit`` recomputation). A replica is a
pure function of its :class:`~sweepctl.campaign.plan.ReplicaSpec`; a checkpoint carries the
whole strip state, so a replica resumed from one is bit-identical to one that was
never interrupted.

A rehearsal replica (:mod:`sweepctl.kernel.rehearsal`) is drawn whole in microseconds,
so it writes no checkpoint: an interrupted one is simply drawn again, bit-identically.
Its row stores as ``cpu_seconds`` and ``wall_seconds`` what the network kernel would
have spent (the driver's cost-model price, :attr:`ReplicaSpec.virtual_seconds`), so
status, ETAs and CPU budgets read as in a real campaign; ``real_cpu_seconds`` and
``real_wall_seconds`` hold what was really spent.
"""

from __future__ import annotations

import contextlib
import json
import os
import socket
import struct
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from sweepctl.campaign.plan import ReplicaSpec, replica_seed
from sweepctl.campaign.store import BUILD_COLUMNS, atomic_write_bytes, code_version
from sweepctl.kernel import NetworkModel, StripState

__all__ = ["ReplicaOutput", "compute_replica", "read_checkpoint", "run_replica"]

_MAGIC = b"SWCK1\n"
_BATCH_ENV = ("SLURM_JOB_ID", "PBS_JOBID", "JOB_ID", "LSB_JOBID")
_blas_limited = False


def _one_blas_thread() -> None:
    global _blas_limited
    if not _blas_limited:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
        _blas_limited = True


@dataclass
class ReplicaOutput:
    """What a worker sends back (plain data)."""

    spec: ReplicaSpec
    gamma_strips: list[float]
    exponents: list[float]
    layers: int
    resumed_at_layer: int
    cpu_seconds: float
    wall_seconds: float
    worker: str
    host: str
    batch_job_id: str | None
    started: datetime
    finished: datetime
    code: dict
    #: what the worker wants logged (e.g. a checkpoint of another build discarded)
    notes: list[str] = field(default_factory=list)
    #: seconds really spent (equal to cpu/wall_seconds unless those are virtual)
    real_cpu_seconds: float | None = None
    real_wall_seconds: float | None = None

    def row(self) -> dict:
        """The replica row of the store's pinned schema."""
        p = self.spec.point
        seed = replica_seed(self.spec.entropy, p, self.spec.replica)
        return {
            "point_key": p.key,
            "p_block": p.p_block,
            "p_open": p.p_open,
            "epsilon": p.epsilon,
            "width": p.width,
            "x": p.x,
            "replica": self.spec.replica,
            "entropy": f"{self.spec.entropy:#x}",
            "spawn_key": list(seed.spawn_key),
            "bit_generator": "PCG64",
            "layers": self.layers,
            "warmup": self.spec.warmup,
            "strips": self.spec.strips,
            "gamma_strips": self.gamma_strips,
            "exponents": self.exponents,
            "Gamma": float(np.mean(self.gamma_strips)),
            "resumed_at_layer": self.resumed_at_layer,
            "cpu_seconds": self.cpu_seconds,
            "wall_seconds": self.wall_seconds,
            "worker": self.worker,
            "host": self.host,
            "batch_job_id": self.batch_job_id,
            "started": self.started,
            "finished": self.finished,
            **self.code,
            "model": json.dumps(
                self.spec.model.to_dict() if self.spec.model is not None else {"kind": "network"},
                sort_keys=True,
            ),
            "real_cpu_seconds": (
                self.cpu_seconds if self.real_cpu_seconds is None else self.real_cpu_seconds
            ),
            "real_wall_seconds": (
                self.wall_seconds if self.real_wall_seconds is None else self.real_wall_seconds
            ),
        }


def _start_state(spec: ReplicaSpec) -> StripState:
    p = spec.point
    model = NetworkModel(p.width, p.x, p.p_block, p.p_open, p.epsilon)
    seed = replica_seed(spec.entropy, p, spec.replica)
    return StripState.start(model, strips=spec.strips, seed=seed, warmup=spec.warmup)


def read_checkpoint(path: Path, spec: ReplicaSpec) -> tuple[StripState | None, dict, str]:
    """The checkpoint of exactly this computation on this build.

    Returns ``(state, header, "")`` to resume, or ``(None, {}, why)`` when there is
    nothing to resume: ``why`` is ``""`` for an absent, foreign or damaged file and
    says which build wrote it when another build did — its bits would mix with this
    build's (see :func:`~sweepctl.campaign.store.code_version`), so the replica starts
    again from layer 0 rather than silently continuing.
    """
    try:
        data = path.read_bytes()
    except OSError:
        return None, {}, ""
    try:
        if not data.startswith(_MAGIC):
            return None, {}, ""
        (n,) = struct.unpack("<I", data[len(_MAGIC) : len(_MAGIC) + 4])
        off = len(_MAGIC) + 4
        header = json.loads(data[off : off + n])
        if header.get("digest") != spec.digest():
            return None, {}, ""
        here = code_version()
        built = header.get("build") or {}
        diff = [k for k in BUILD_COLUMNS if built.get(k) != here[k]]
        if diff:
            what = ", ".join(f"{k} {built.get(k)!r} (here {here[k]!r})" for k in diff)
            return None, {}, f"checkpoint written by another build: {what}"
        return StripState.from_bytes(data[off + n :]), header, ""
    except (ValueError, KeyError, struct.error, OSError):
        return None, {}, ""


def _write_checkpoint(path: Path, spec: ReplicaSpec, state: StripState, header: dict) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    head = json.dumps({**header, "digest": spec.digest(), "build": code_version()}).encode()
    atomic_write_bytes(path, _MAGIC + struct.pack("<I", len(head)) + head + state.to_bytes())


def _rehearse(spec: ReplicaSpec) -> ReplicaOutput:
    """A rehearsal replica: strip values drawn from the law with the replica's seed."""
    t_wall0 = time.perf_counter()
    t_cpu0 = time.process_time()
    started = datetime.now(UTC)
    _log_event("started", spec)
    p = spec.point
    seed = replica_seed(spec.entropy, p, spec.replica)
    g = spec.model.strip_gammas(p.width, p.x, spec.layers, spec.strips, seed)
    real_cpu = time.process_time() - t_cpu0
    real_wall = time.perf_counter() - t_wall0
    virtual = spec.virtual_seconds
    worker, host = _identity()
    return ReplicaOutput(
        spec=spec,
        gamma_strips=[float(v) for v in g],
        exponents=[],  # the law has Γ only, no spectrum
        layers=spec.layers,
        resumed_at_layer=0,
        cpu_seconds=real_cpu if virtual is None else virtual,
        wall_seconds=real_wall if virtual is None else virtual,
        worker=worker,
        host=host,
        batch_job_id=next((os.environ[k] for k in _BATCH_ENV if os.environ.get(k)), None),
        started=started,
        finished=datetime.now(UTC),
        code=code_version(),
        real_cpu_seconds=real_cpu,
        real_wall_seconds=real_wall,
    )


def compute_replica(spec: ReplicaSpec, *, use_checkpoint: bool = True) -> ReplicaOutput:
    """Compute (or finish) one replica."""
    if spec.model is not None:
        return _rehearse(spec)
    _one_blas_thread()
    t_wall0 = time.perf_counter()
    t_cpu0 = time.process_time()
    started = datetime.now(UTC)
    ck = Path(spec.checkpoint) if (use_checkpoint and spec.checkpoint) else None
    prior_cpu = prior_wall = 0.0
    resumed_at = 0
    found, header, why = read_checkpoint(ck, spec) if ck is not None else (None, {}, "")
    notes = [why] if why else []
    if found is not None:
        state = found
        prior_cpu = float(header.get("cpu_seconds", 0.0))
        prior_wall = float(header.get("wall_seconds", 0.0))
        resumed_at = state.layers_done
        _log_event("resumed", spec, layers=resumed_at)
    else:
        state = _start_state(spec)
        if why:
            _log_event("restarted", spec, reason=why)
        else:
            _log_event("started", spec)
    total = spec.warmup + spec.layers
    last_ck = time.perf_counter()
    # Steps of a fraction of a second keep checkpoints on time without slowing the kernel.
    step = max(16, min(total, 2048 // max(1, spec.point.width // 8)))
    while state.layers_done < total:
        state.advance(min(step, total - state.layers_done))
        if (
            ck is not None
            and time.perf_counter() - last_ck >= spec.checkpoint_seconds
            and state.layers_done < total
        ):
            _write_checkpoint(
                ck,
                spec,
                state,
                {
                    "cpu_seconds": prior_cpu + time.process_time() - t_cpu0,
                    "wall_seconds": prior_wall + time.perf_counter() - t_wall0,
                },
            )
            last_ck = time.perf_counter()
    res = state.result()
    worker, host = _identity()
    return ReplicaOutput(
        spec=spec,
        gamma_strips=[float(g) for g in res.Gamma_strips],
        exponents=[float(e) for e in res.exponents.mean(axis=0)],
        layers=res.layers,
        resumed_at_layer=resumed_at,
        cpu_seconds=prior_cpu + time.process_time() - t_cpu0,
        wall_seconds=prior_wall + time.perf_counter() - t_wall0,
        worker=worker,
        host=host,
        batch_job_id=next((os.environ[k] for k in _BATCH_ENV if os.environ.get(k)), None),
        started=started,
        finished=datetime.now(UTC),
        code=code_version(),
        notes=notes,
    )


def _identity() -> tuple[str, str]:
    worker = f"pid:{os.getpid()}"
    with contextlib.suppress(ImportError, ValueError):
        from distributed import get_worker

        worker = get_worker().address
    return worker, socket.gethostname()


def _log_event(kind: str, spec: ReplicaSpec, **extra) -> None:
    """Tell the driver (which alone writes the events log) through Dask's event topics."""
    with contextlib.suppress(ImportError, ValueError):
        from distributed import get_worker

        w = get_worker()
        w.log_event(
            "sweepctl",
            {
                "event": kind,
                "point": spec.point.key,
                "replica": spec.replica,
                "worker": w.address,
                "host": socket.gethostname(),
                **extra,
            },
        )


def run_replica(spec: ReplicaSpec) -> ReplicaOutput:
    """Dask task entry point."""
    return compute_replica(spec)
