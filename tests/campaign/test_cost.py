"""The cost model's QR schedule against the kernel's own QR count, and its use in plans."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.recipe import Point
from sweepctl.kernel import NetworkModel, StripState
from sweepctl.kernel.schedule import expected_qr_per_layer

CASES = [
    # (N, p_block, p_open, epsilon, x, strips)
    (8, 0.0, 0.0, 1e-6, 0.0, 8),
    (8, 0.0, 0.0, 1e-6, 0.6, 8),
    (4, 1 / 3, 1 / 3, 1e-6, 0.0, 8),
    (8, 0.1, 0.1, 1e-6, 0.0, 8),
    (16, 0.002, 0.002, 1e-6, 0.0, 8),  # a blocking node in about a quarter of the columns
    (4, 0.05, 0.02, 1e-2, 0.3, 4),  # blocking nodes that do not force a QR each
]


@pytest.mark.parametrize("case", CASES)
def test_expected_qrs_per_layer_match_the_kernel(case):
    n, pb, po, eps, x, strips = case
    model = NetworkModel(n, x, pb, po, eps)
    layers = 6000
    state = StripState.start(model, strips=strips, seed=3, warmup=0)
    state.advance(layers)
    counted = state.reorthogonalisations / layers  # the start frame's QR is not counted
    q = expected_qr_per_layer(model, strips)
    # derived: QRs form a renewal process; over `layers` layers the count's relative
    # spread is at most 1/√(QRs counted), so 4σ of that (plus one QR for the ends)
    tol = 4.0 * math.sqrt(max(counted, 1e-9) * layers) / layers + 1.0 / layers
    assert abs(q - counted) <= tol, (q, counted, tol)


def test_clean_network_schedule_is_the_derived_one_eighth():
    # derived: a clean column at x = 0 grows the bound by 2·asinh(1) = 1.7627; the budget
    # ln(1e-3/2⁻⁵²) = 29.12 holds 16 such columns (16.5), so one QR per 8 layers
    assert expected_qr_per_layer(NetworkModel(8, 0.0), 8) == pytest.approx(0.125, abs=1e-12)


def test_disorder_makes_a_point_dearer_as_the_schedule_says():
    cost = CostModel(
        [{"width": 8, "column_seconds": 2e-6, "column_seconds_disorder": 3e-6, "qr_seconds": 1e-5}]
    )
    clean = cost.point_seconds(Point(0.0, 0.0, 1e-6, 8, 0.0), 8)
    dis = cost.point_seconds(Point(1 / 3, 1 / 3, 1e-6, 8, 0.0), 8)
    # derived: clean 2e-6 + 1e-5/8; with p = 1/3 on 64 nodes per column every column has a
    # blocking node (1 − (2/3)⁶⁴ ≈ 1), each forcing a QR: 3e-6 + 2 × 1e-5
    assert clean == pytest.approx(2e-6 + 1e-5 / 8, rel=1e-12)
    assert dis == pytest.approx(3e-6 + 2 * 1e-5, rel=1e-3)
    assert np.isfinite([clean, dis]).all()
