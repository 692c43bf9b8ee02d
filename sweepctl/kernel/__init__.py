"""Transfer-matrix kernel: network model, strip state, Lyapunov engine, QR schedule;
the rehearsal model (a known scaling law with network-like noise).

Pure NumPy/SciPy (plus compiled inner loops); no I/O, no Dask. The public entry
point is :func:`lyapunov_spectrum`; the campaign layer drives :class:`StripState`.
Names are imported on first use, so that plans and status, which need only the
model and the schedule, do not compile the kernel.
"""

from __future__ import annotations

import importlib

_WHERE = {
    "LOG_COND_BUDGET": "schedule",
    "expected_qr_per_layer": "schedule",
    "LyapunovResult": "engine",
    "PrecisionOutcome": "engine",
    "StripState": "engine",
    "advance_to_precision": "engine",
    "default_warmup": "network",
    "lyapunov_spectrum": "engine",
    "product_spectrum": "engine",
    "LayerDraws": "network",
    "NetworkModel": "network",
    "NOISE_CONSTANT": "rehearsal",
    "RehearsalModel": "rehearsal",
    "dense_column": "network",
    "dense_layer": "network",
    "draw_layers": "network",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str):
    if name in _WHERE:
        return getattr(importlib.import_module(f"sweepctl.kernel.{_WHERE[name]}"), name)
    raise AttributeError(f"module 'sweepctl.kernel' has no attribute {name!r}")
