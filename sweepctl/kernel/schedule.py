"""The re-orthogonalisation schedule: when the engine does a QR, and how often on average.

A column of nodes has condition number ``e^{2 max θ}`` (the largest node block
``[[cosh θ, sinh θ], [sinh θ, cosh θ]]`` over the column's nodes, and over the strips,
which share one schedule). Products multiply condition numbers, so the sum ``G`` of
``2 max θ`` over the columns applied since the last QR bounds the log of the frame's
condition number. The engine does a QR before a column would take ``G`` above
:data:`COLUMN_BUDGET` = ln(1e-3/eps) − :data:`ORTHO_RESERVE` (the reserve covers the
frame a CholeskyQR leaves, orthonormal only to ``η ≤ ETA_MAX``); a single column above
the budget is applied alone. ``G`` is summed in integer units of 2⁻²⁴ so that the
schedule does not depend on how layers are chunked.

:func:`expected_qr_per_layer` replays exactly that rule on columns drawn from the
model's node distribution (no frame is touched), which is what cost estimates need:
with blocking nodes (2θ = 2 arccosh(1/ε) ≈ 29 at ε = 1e-6) nearly every column forces
a QR, 2 per layer instead of 1/8 on the clean network at x = 0.

Pure NumPy; no numba, so that plans and status can use it without compiling the kernel.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from sweepctl.kernel.network import BLOCKING, NORMAL, OPEN, NetworkModel

__all__ = [
    "COLUMN_BUDGET",
    "ETA_MAX",
    "GROWTH_SCALE",
    "LOG_COND_BUDGET",
    "ORTHO_RESERVE",
    "budget_units",
    "column_growth_law",
    "expected_qr_per_layer",
    "growth_units",
]

#: Log of the largest condition-number bound allowed between two QRs.
LOG_COND_BUDGET = math.log(1e-3 / np.finfo(np.float64).eps)
#: Largest orthogonality defect ``η ≥ ||W^H W − I||_2`` accepted from a CholeskyQR
#: (``sweepctl.kernel._qr``; above it that strip falls back to Householder).
ETA_MAX = 1.0 / 32.0
#: Log condition number a frame with defect ``η ≤ ETA_MAX`` brings into the next
#: interval: ``cond(W) ≤ √((1 + η)/(1 − η))`` (derived: ``W^H W``'s eigenvalues lie in
#: ``[1 − η, 1 + η]``). Reserved out of :data:`LOG_COND_BUDGET` for every interval.
ORTHO_RESERVE = 0.5 * math.log((1.0 + ETA_MAX) / (1.0 - ETA_MAX))
#: What the columns of one interval may add: ``LOG_COND_BUDGET − ORTHO_RESERVE``.
COLUMN_BUDGET = LOG_COND_BUDGET - ORTHO_RESERVE
#: Growth bounds are summed as integers in units of 2**-24 (exact, associative).
GROWTH_SCALE = 2.0**24


def growth_units(model: NetworkModel) -> np.ndarray:
    """``2θ`` per ``[sublattice, kind]`` in integer units (what the engine sums)."""
    return np.ceil(model.growth_table() * GROWTH_SCALE).astype(np.int64)


def budget_units(log_cond_budget: float = LOG_COND_BUDGET) -> int:
    """The columns' share of the budget, ``log_cond_budget − ORTHO_RESERVE``, in the same
    integer units (never negative)."""
    return max(0, int((log_cond_budget - ORTHO_RESERVE) * GROWTH_SCALE))


def column_growth_law(model: NetworkModel, strips: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Distribution of a column's growth bound, for the A and the B column.

    The bound is the largest ``2θ`` over the ``N·strips`` i.i.d. nodes of the column:
    ``P(max ≤ v) = (Σ_{kinds with 2θ ≤ v} p_kind)^{N·strips}``. Returns, per
    sublattice, ``(values, probabilities)`` over the distinct growth values.
    """
    g = growth_units(model)
    pb, po = model.p_block, model.p_open
    out = []
    for half in (0, 1):
        # on A a node blocks with p_block and is open with p_open; on B the roles swap
        p_kind = {
            NORMAL: 1.0 - pb - po,
            BLOCKING: pb if half == 0 else po,
            OPEN: po if half == 0 else pb,
        }
        vals = sorted({int(g[half, k]) for k, p in p_kind.items() if p > 0})
        cdf = [
            sum(p for k, p in p_kind.items() if p > 0 and g[half, k] <= v) ** (model.width * strips)
            for v in vals
        ]
        probs = np.diff(np.concatenate([[0.0], np.minimum(cdf, 1.0)]))
        out.append((np.array(vals, dtype=np.int64), probs / probs.sum()))
    return out


@lru_cache(maxsize=4096)
def _expected(model: NetworkModel, strips: int, budget: int, columns: int) -> float:
    law = column_growth_law(model, strips)
    rng = np.random.default_rng(0x5EED)
    layers = columns // 2
    draws = [
        vals[rng.choice(vals.size, size=layers, p=probs)]
        if vals.size > 1
        else np.full(layers, vals[0])
        for vals, probs in law
    ]
    seq = np.empty(2 * layers, dtype=np.int64)
    seq[0::2], seq[1::2] = draws
    qrs, last = _count(seq.tolist(), budget)
    return 2.0 * qrs / last if qrs else 0.0


def _count(seq: list[int], budget: int) -> tuple[int, int]:
    """QRs the engine's rule does on the column sequence ``seq`` (mirrors its loop),
    and the columns applied before the last of them (the renewal period measured)."""
    qrs, acc, last = 0, 0, 0
    for i, g in enumerate(seq):
        if acc + g > budget and acc > 0:
            qrs += 1
            acc = 0
            last = i
        acc += g
    return qrs, last


def expected_qr_per_layer(
    model: NetworkModel, strips: int, *, log_cond_budget: float = LOG_COND_BUDGET
) -> float:
    """Mean number of QRs per layer the engine does for ``model`` with ``strips`` strips.

    Replays the schedule on 40 000 columns drawn from :func:`column_growth_law` with a
    fixed seed (relative statistical error ≲ 1 % where the schedule is random; exact on
    the clean network). The QRs at the end of the warm-up and for read-out are not
    counted (one each per replica).
    """
    return _expected(model, int(strips), budget_units(log_cond_budget), 40_000)
