"""A straightforward batched-NumPy transfer-matrix code, kept as the speed baseline.

What a physicist would write in an afternoon: elementwise node updates on strided
views, ``np.roll`` for the B sublattice, ``numpy.linalg.qr`` every 8 layers. Same
model and conventions as :mod:`sweepctl.kernel` (clean coupling only).
"""

from __future__ import annotations

import math

import numpy as np

QR_EVERY = 8


def baseline_spectrum(
    width: int, x: float, layers: int, *, strips: int = 8, seed: int = 0, warmup: int = 0
) -> np.ndarray:
    """``(strips, width)`` per-layer exponents of the clean-coupling network."""
    rng = np.random.default_rng(seed)
    n, nl = width, 2 * width
    s_a, s_b = math.exp(x), math.exp(-x)
    c_a, c_b = math.sqrt(1 + s_a * s_a), math.sqrt(1 + s_b * s_b)
    f = rng.standard_normal((strips, nl, n)) + 1j * rng.standard_normal((strips, nl, n))
    f = np.linalg.qr(f)[0]
    acc = np.zeros((strips, n))

    def column(f, c, s):
        a, b = f[:, 0::2], f[:, 1::2]
        new_a = c * a + s * b
        new_b = s * a + c * b
        f[:, 0::2] = new_a
        f[:, 1::2] = new_b
        return f

    total = warmup + layers
    for layer in range(total):
        ph = np.exp(2j * np.pi * rng.random((strips, 2 * nl)))
        f = column(f, c_a, s_a)
        f *= ph[:, :nl, None]
        g = np.roll(f, -1, axis=1)  # pairs (2j+1, 2j+2) become (2j, 2j+1)
        g = column(g, c_b, s_b)
        f = np.roll(g, 1, axis=1)
        f *= ph[:, nl:, None]
        if (layer + 1) % QR_EVERY == 0 or layer + 1 == total:
            q, r = np.linalg.qr(f)
            if layer >= warmup:
                acc += np.log(np.abs(np.diagonal(r, axis1=1, axis2=2)))
            f = q
    return acc / layers
