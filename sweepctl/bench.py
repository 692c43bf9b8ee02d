"""Kernel throughput on this machine (one BLAS thread), for tables and cost estimates.

Flop counts are nominal (complex multiply 6, complex add 2): per layer and strip a
node update costs ``48 N M`` (two columns of ``N`` pairs on ``M`` frame columns,
node block and phase) and a Householder QR with explicit ``Q`` of a ``2N × M``
frame ``8 (4 N M² − 2 M³/3)`` per re-orthogonalisation.
"""

from __future__ import annotations

import json
import os
import platform
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from sweepctl import __version__
from sweepctl.errors import SweepctlError

__all__ = [
    "BenchRow",
    "bench_widths",
    "calibration_path",
    "cost_model",
    "machine_info",
    "zgemm_gflops",
]


@dataclass(frozen=True)
class BenchRow:
    """Throughput at one width."""

    width: int
    strips: int
    layers: int
    seconds: float
    layers_per_second: float  # per strip
    strip_layers_per_second: float  # summed over strips
    qr_per_layer: float
    gflops: float

    def as_dict(self) -> dict:
        """Plain dict for JSON."""
        return asdict(self)


def bench_widths(
    widths: list[int], strips: int = 8, seconds: float = 1.0, x: float = 0.0
) -> list[BenchRow]:
    """Measure layers per second at each width for about ``seconds`` each.

    A short calibration run sizes the timed run; compilation and warm-up are
    excluded. The BLAS is limited to one thread for the measurement.
    """
    # Imported here: the driver needs only the stored calibration, not the compiled kernel.
    from sweepctl.kernel import NetworkModel, StripState

    rows = []
    with threadpool_limits(1):
        for n in widths:
            model = NetworkModel(int(n), x)
            state = StripState.start(model, strips=strips, seed=0, warmup=0)
            t0 = time.perf_counter()
            state.advance(16)
            calib = 16
            while time.perf_counter() - t0 < 0.1 * seconds:
                state.advance(calib)
                calib *= 2
            rate = (2 * calib - 16) / max(time.perf_counter() - t0, 1e-9)
            layers = max(16, int(rate * seconds))
            qr_before = state.reorthogonalisations
            t0 = time.perf_counter()
            state.advance(layers)
            dt = time.perf_counter() - t0
            n_qr = state.reorthogonalisations - qr_before
            m = n
            flops = strips * (layers * 48.0 * n * m + n_qr * 8.0 * (4 * n * m * m - 2 * m**3 / 3))
            rows.append(
                BenchRow(
                    width=int(n),
                    strips=strips,
                    layers=layers,
                    seconds=dt,
                    layers_per_second=layers / dt,
                    strip_layers_per_second=strips * layers / dt,
                    qr_per_layer=n_qr / layers,
                    gflops=flops / dt / 1e9,
                )
            )
    return rows


def zgemm_gflops(size: int = 512, repeats: int = 5) -> float:
    """Complex matrix-multiply rate of this machine with one BLAS thread (``8 n³`` flops)."""
    rng = np.random.default_rng(0)
    a = rng.standard_normal((size, size)) + 1j * rng.standard_normal((size, size))
    b = rng.standard_normal((size, size)) + 1j * rng.standard_normal((size, size))
    with threadpool_limits(1):
        a @ b
        best = np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            a @ b
            best = min(best, time.perf_counter() - t0)
    return 8.0 * size**3 / best / 1e9


def machine_info() -> dict:
    """Host facts recorded beside a calibration."""
    return {
        "host": platform.node(),
        "machine": platform.machine(),
        "processor": platform.processor() or platform.machine(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "sweepctl": __version__,
        "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def calibration_path() -> Path:
    """Where ``sweepctl`` keeps this machine's calibration (XDG cache directory)."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "sweepctl" / f"calibration-{platform.node() or 'host'}.json"


def calibration_payload(rows: list[BenchRow], gemm: float | None = None) -> dict:
    """The JSON document ``sweepctl bench --json`` writes and cost models read."""
    return {
        "kind": "sweepctl-kernel-calibration",
        "machine": machine_info(),
        "zgemm_gflops": gemm,
        "widths": [r.as_dict() for r in rows],
    }


def cost_model(widths: list[int], path: str | Path | None = None, measure: bool = True):
    """A :class:`~sweepctl.campaign.plan.CostModel` and where it came from.

    ``path`` (a ``sweepctl bench --json`` file) wins; then this machine's cached
    calibration; otherwise a short measurement at ``widths`` (saved to the cache).
    Returns ``(None, reason)`` when nothing is stored and ``measure`` is false.
    """
    from sweepctl.campaign.plan import CostModel

    if path is not None:
        p = Path(path)
        try:
            data = json.loads(p.read_text())
            return CostModel(data["widths"]), f"calibration {p}"
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise SweepctlError(
                f"--calibration: cannot use {str(p)!r} ({exc}); write one with "
                "sweepctl bench --json FILE"
            ) from None
    cached = calibration_path()
    if cached.exists():
        try:
            data = json.loads(cached.read_text())
            return CostModel(data["widths"]), f"calibration {cached}"
        except (OSError, ValueError, KeyError, TypeError):
            pass
    if not measure:
        return None, "no calibration stored"
    ws = sorted({int(w) for w in widths} | {4})
    rows = bench_widths(ws, strips=8, seconds=0.15)
    payload = calibration_payload(rows)
    try:
        cached.parent.mkdir(parents=True, exist_ok=True)
        tmp = cached.with_suffix(".tmp")
        tmp.write_text(json.dumps(payload, indent=2) + "\n")
        os.replace(tmp, cached)
    except OSError:
        pass
    return CostModel(payload["widths"]), f"measured now at N = {', '.join(map(str, ws))}"
