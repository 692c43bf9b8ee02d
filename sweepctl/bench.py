"""Kernel throughput on this machine (one BLAS thread), for tables and cost estimates.

The cost of a strip-layer is ``c + q·t_QR``: ``c`` the node columns, phases and
draws of one layer (measured on the clean network and, separately, with node
disorder, which draws 2N more variates), ``q`` the QRs per layer that the
re-orthogonalisation schedule does for the point (:func:`~sweepctl.kernel.schedule.
expected_qr_per_layer`: 1/8 on the clean network at x = 0, ≈ 2 with blocking nodes)
and ``t_QR`` one QR of one strip's frame, timed on its own. Calibrating the parts
separately is what lets one calibration price every disorder, ε and coupling.

Flop counts are nominal (complex multiply 6, complex add 2): per layer and strip a
node update costs ``48 N M`` (two columns of ``N`` pairs on ``M`` frame columns,
node block and phase) and a Householder QR with explicit ``Q`` of a ``2N × M``
frame ``8 (4 N M² − 2 M³/3)`` per re-orthogonalisation. The engine's certified CholeskyQR
does about as many (two ``zherk`` and a ``ztrsm`` of ``8 N M²`` each, ``zpotrf``
``4 M³/3``: ``24 N M² + 4 M³/3``, 25.3 N³ against 26.7 N³ at ``M = N``). Up to
``N = 178`` the certificate's ``zherk`` runs in single precision (``cherk``, about half
the time; ``sweepctl.kernel._qr.single_certificate``), which the count does not discount:
the rate is Householder-equivalent flops per second, a measure of time per layer, not
of double-precision flops executed.
"""

from __future__ import annotations

import hashlib
import json
import math
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
    """Throughput and cost parts at one width."""

    width: int
    strips: int
    layers: int
    seconds: float
    layers_per_second: float  # per strip, clean network at x = 0
    strip_layers_per_second: float  # summed over strips
    qr_per_layer: float
    gflops: float
    #: seconds per strip and layer for everything but the QRs, clean network
    column_seconds: float = math.nan
    #: the same with node disorder (p_block = p_open = 1/3, ε = 1e-6)
    column_seconds_disorder: float = math.nan
    #: seconds of one QR of one strip's 2N × N frame
    qr_seconds: float = math.nan
    #: strip-layers per second with that node disorder (QR after nearly every column)
    strip_layers_per_second_disorder: float = math.nan

    def as_dict(self) -> dict:
        """Plain dict for JSON."""
        return asdict(self)


def _clock() -> float:
    """CPU seconds of this process: what campaigns are charged (``cpu_seconds`` of a
    replica is process time too), and unaffected by other load on the machine."""
    return time.process_time()


def _timed_run(model, strips: int, seconds: float) -> tuple[int, float, int]:
    """(layers, seconds, QRs) of an advance sized to last about ``seconds``."""
    from sweepctl.kernel import StripState

    state = StripState.start(model, strips=strips, seed=0, warmup=0)
    t0 = _clock()
    state.advance(16)
    calib = 16
    while _clock() - t0 < 0.1 * seconds:
        state.advance(calib)
        calib *= 2
    rate = (2 * calib - 16) / max(_clock() - t0, 1e-9)
    layers = max(16, int(rate * seconds))
    qr_before = state.reorthogonalisations
    t0 = _clock()
    state.advance(layers)
    return layers, _clock() - t0, state.reorthogonalisations - qr_before


def _qr_seconds(width: int, strips: int, seconds: float) -> float:
    """Seconds of one QR of one strip's frame (the engine's own scheduled QR, the certified
    CholeskyQR, on an orthonormal frame as the engine sees after a QR; warm cache)."""
    from sweepctl.kernel._qr import reorthogonalise

    rng = np.random.default_rng(1)
    shape = (strips, 2 * width, width)
    frame = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    reorthogonalise(frame, cholesky=True)
    reps, t = 1, 0.0
    while True:
        t0 = _clock()
        for _ in range(reps):
            reorthogonalise(frame, cholesky=True)
        t = _clock() - t0
        if t >= 0.2 * seconds or reps >= 1 << 16:
            break
        reps *= 4
    return t / (reps * strips)


def bench_widths(
    widths: list[int], strips: int = 8, seconds: float = 1.0, x: float = 0.0, repeats: int = 3
) -> list[BenchRow]:
    """Measure throughput and the cost parts at each width for about ``seconds`` each.

    A short calibration run sizes each timed run; compilation and warm-up are
    excluded. The BLAS is limited to one thread for the measurement, and times are
    the process's CPU time (see :func:`_clock`). Each width is measured ``repeats``
    times, interleaved with the other widths, and every part is the median of its
    repeats: on a shared virtual machine single 1-s runs scattered by 40 % (measured),
    most of it in whichever width ran first.
    """
    # Imported here: the driver needs only the stored calibration, not the compiled kernel.
    # The engine must be imported before the thread limit is set: it loads SciPy's
    # LAPACK/BLAS, and threadpoolctl limits only libraries already loaded (a library
    # loaded inside the block keeps its default threads, which on busy cores made an
    # N = 64 QR a thousand times slower).
    import sweepctl.kernel.engine  # noqa: F401
    from sweepctl.kernel import NetworkModel

    repeats = max(1, int(repeats))
    share = seconds / repeats
    parts: dict[int, list[tuple]] = {int(n): [] for n in widths}
    with threadpool_limits(1):
        # one throw-away pass warms every code path (loaded machine code, workspaces)
        first = int(widths[0])
        _timed_run(NetworkModel(first, x), strips, 0.05)
        _timed_run(NetworkModel(first, x, 1.0 / 3.0, 1.0 / 3.0, 1e-6), strips, 0.05)
        for _ in range(repeats):
            for n in parts:
                t_qr = _qr_seconds(n, strips, share)
                layers, dt, n_qr = _timed_run(NetworkModel(n, x), strips, share)
                dis = NetworkModel(n, x, 1.0 / 3.0, 1.0 / 3.0, 1e-6)
                layers_d, dt_d, n_qr_d = _timed_run(dis, strips, 0.5 * share)
                parts[n].append((t_qr, layers, dt, n_qr, layers_d, dt_d, n_qr_d))
    rows = []
    for n, runs in parts.items():
        t_qr = float(np.median([r[0] for r in runs]))
        per = float(np.median([r[2] / r[1] for r in runs]))  # seconds per layer, clean
        per_d = float(np.median([r[5] / r[4] for r in runs]))
        q = float(np.median([r[3] / r[1] for r in runs]))
        q_d = float(np.median([r[6] / r[4] for r in runs]))
        layers = int(sum(r[1] for r in runs))
        dt = layers * per
        # what is not QR; never below a tenth of the whole (timer noise at tiny N)
        col = max(per / strips - q * t_qr, 0.1 * per / strips)
        col_d = max(per_d / strips - q_d * t_qr, 0.1 * per_d / strips)
        m = n
        flops = strips * (48.0 * n * m + q * 8.0 * (4 * n * m * m - 2 * m**3 / 3)) / per
        rows.append(
            BenchRow(
                width=n,
                strips=strips,
                layers=layers,
                seconds=dt,
                layers_per_second=1.0 / per,
                strip_layers_per_second=strips / per,
                qr_per_layer=q,
                gflops=flops / 1e9,
                column_seconds=col,
                column_seconds_disorder=col_d,
                qr_seconds=t_qr,
                strip_layers_per_second_disorder=strips / per_d,
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
        for _ in range(repeats):  # process time, like the kernel's rates it is compared with
            t0 = _clock()
            a @ b
            best = min(best, _clock() - t0)
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


#: 3: QR seconds of the certified CholeskyQR (format 2 timed Householder, the older kernel's
#: QR, and is measured again); 2: cost parts (columns, QR) per width; 1: throughput only
CALIBRATION_FORMAT = 3


def calibration_path() -> Path:
    """Where ``sweepctl`` keeps this machine's calibration (XDG cache directory)."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "sweepctl" / f"calibration-{platform.node() or 'host'}.json"


def kernel_fingerprint() -> str:
    """SHA-256 (first 16 hex digits) of the kernel's source files and of the versions of
    the libraries its speed depends on (NumPy, SciPy with its BLAS, numba): a calibration
    measured with other code prices replicas by that code's speed, so the cache is
    measured again when this changes."""
    from importlib.metadata import version

    digest = hashlib.sha256()
    for path in sorted((Path(__file__).parent / "kernel").glob("*.py")):
        digest.update(path.name.encode() + b"\0" + path.read_bytes())
    for package in ("numpy", "scipy", "numba"):
        digest.update(f"{package}={version(package)}".encode())
    return digest.hexdigest()[:16]


def calibration_payload(rows: list[BenchRow], gemm: float | None = None) -> dict:
    """The JSON document ``sweepctl bench --out FILE`` writes and cost models read."""
    return {
        "kind": "sweepctl-kernel-calibration",
        "format": CALIBRATION_FORMAT,
        "kernel": kernel_fingerprint(),
        "machine": machine_info(),
        "zgemm_gflops": gemm,
        "widths": [r.as_dict() for r in rows],
    }


def cost_model(widths: list[int], path: str | Path | None = None, measure: bool = True):
    """A :class:`~sweepctl.campaign.cost.CostModel` and where it came from.

    ``path`` (a ``sweepctl bench --out`` file) wins; then this machine's cached
    calibration, if the same kernel code measured it (:func:`kernel_fingerprint`);
    otherwise a short measurement at ``widths`` (saved to the cache).
    Returns ``(None, reason)`` when nothing is stored and ``measure`` is false.
    """
    from sweepctl.campaign.cost import CostModel

    if path is not None:
        p = Path(path)
        try:
            data = json.loads(p.read_text())
            if data.get("format") != CALIBRATION_FORMAT:
                raise ValueError("made by an older sweepctl, without the cost parts")
            return CostModel(data["widths"]), f"calibration {p}"
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise SweepctlError(
                f"--calibration: cannot use {str(p)!r} ({exc}); write one with "
                "sweepctl bench --out FILE"
            ) from None
    cached = calibration_path()
    known: list[dict] = []
    if cached.exists():
        try:
            data = json.loads(cached.read_text())
            # one from an older format or other kernel code is measured again
            if data.get("format") == CALIBRATION_FORMAT and data.get("kernel") == (
                kernel_fingerprint()
            ):
                known = list(data["widths"])
                have = sorted(int(r["width"]) for r in known)
                # a width outside the cached range would be priced by extrapolation
                # (QR ∝ N³ from two small widths can be far off): measure it too
                outside = sorted({int(w) for w in widths if int(w) > have[-1] or int(w) < have[0]})
                if not outside or not measure:
                    note = (
                        f" (extrapolated to N = {', '.join(map(str, outside))})" if outside else ""
                    )
                    return CostModel(known), f"calibration {cached}{note}"
                widths = outside
        except (OSError, ValueError, KeyError, TypeError, IndexError):
            known = []
    if not measure:
        return None, "no calibration stored"
    ws = sorted({int(w) for w in widths} | ({4} if not known else set()))
    rows = bench_widths(ws, strips=8, seconds=0.15)
    payload = calibration_payload(rows)
    if known:
        payload["widths"] = sorted(
            [r for r in known if int(r["width"]) not in ws] + payload["widths"],
            key=lambda r: int(r["width"]),
        )
    origin = f"measured now at N = {', '.join(map(str, ws))}"
    if known:
        origin = f"calibration {cached}, with N = {', '.join(map(str, ws))} measured now"
    try:
        cached.parent.mkdir(parents=True, exist_ok=True)
        tmp = cached.with_suffix(".tmp")
        tmp.write_text(json.dumps(payload, indent=2) + "\n")
        os.replace(tmp, cached)
        origin += f", saved to {cached} for later estimates"
    except OSError:
        origin += " (not saved: the cache directory is not writable)"
    return CostModel(payload["widths"]), origin
