"""Transfer-matrix kernel: network model, strip state, Lyapunov engine.

Pure NumPy/SciPy (plus compiled inner loops); no I/O, no Dask. The public entry
point is :func:`lyapunov_spectrum`; the campaign layer drives :class:`StripState`.
"""

from sweepctl.kernel.engine import (
    LOG_COND_BUDGET,
    LyapunovResult,
    PrecisionOutcome,
    StripState,
    advance_to_precision,
    default_warmup,
    lyapunov_spectrum,
    product_spectrum,
)
from sweepctl.kernel.network import (
    LayerDraws,
    NetworkModel,
    dense_column,
    dense_layer,
    draw_layers,
)

__all__ = [
    "LOG_COND_BUDGET",
    "LayerDraws",
    "LyapunovResult",
    "NetworkModel",
    "PrecisionOutcome",
    "StripState",
    "advance_to_precision",
    "default_warmup",
    "dense_column",
    "dense_layer",
    "draw_layers",
    "lyapunov_spectrum",
    "product_spectrum",
]
