"""Kernel throughput on this machine (one BLAS thread), for tables and cost estimates.

Flop counts are nominal (complex multiply 6, complex add 2): per layer and strip a
node update costs ``48 N M`` (two columns of ``N`` pairs on ``M`` frame columns,
node block and phase) and a Householder QR with explicit ``Q`` of a ``2N × M``
frame ``8 (4 N M² − 2 M³/3)`` per re-orthogonalisation.
"""

from __future__ import annotations

import platform
import time
from dataclasses import asdict, dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from sweepctl import __version__
from sweepctl.kernel import NetworkModel, StripState

__all__ = ["BenchRow", "bench_widths", "machine_info", "zgemm_gflops"]


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
