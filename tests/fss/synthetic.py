"""Invented data for synthetic-recovery tests: a known scaling form plus Gaussian noise.

The "true" parameters below are chosen for the test (ν near the published band so the
problem has realistic conditioning); they are not measurements.
"""

from __future__ import annotations

import numpy as np

from sweepctl.fss import Orders, ScalingData, ScalingModel

WIDTHS = (4, 8, 16, 32, 64)
COUPLINGS = np.linspace(-0.3, 0.3, 11)

#: general form, orders (2,1,1,0): θ = (ν, y, x_c); f = f00, f10, f20, f01, f11, f21
GENERAL = ScalingModel(Orders(2, 1, 1, 0))
GENERAL_THETA = np.array([2.6, -0.9, 0.02])
GENERAL_F = np.array([0.8, -0.9, 0.5, 0.4, 0.3, 0.2])

#: duality-symmetric form, orders (2,1,1,0): θ = (ν, y); f = f00, f20, f01, f21
SYMMETRIC = ScalingModel(Orders(2, 1, 1, 0), symmetric=True)
SYMMETRIC_THETA = np.array([2.6, -0.9])
SYMMETRIC_F = np.array([0.8, 0.5, 0.4, 0.2])


def make(
    seed: int,
    model: ScalingModel = GENERAL,
    theta: np.ndarray = GENERAL_THETA,
    f: np.ndarray = GENERAL_F,
    rel_err: float = 0.003,
    widths=WIDTHS,
) -> ScalingData:
    """Γ of the form at every (N, x), with relative Gaussian noise ``rel_err``."""
    rng = np.random.default_rng(seed)
    n = np.repeat(np.asarray(widths, float), COUPLINGS.size)
    x = np.tile(COUPLINGS, len(widths))
    g = model.evaluate(theta, f, x, n)
    err = rel_err * g
    return ScalingData(n, x, g + err * rng.standard_normal(g.size), err)
