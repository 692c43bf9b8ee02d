"""A straightforward batched-NumPy transfer-matrix code, kept as the speed peer.

What a physicist would write in an afternoon: elementwise node updates on strided
views, ``np.roll`` for the B sublattice, ``numpy.linalg.qr`` on the stacked frames.
Same model and conventions as :mod:`sweepctl.kernel` (DEVELOPERS.md, "Physics
conventions"), with its own random stream. Clean coupling: a QR every 8 layers (the
growth bound of the clean network at x = 0 allows 8). With node disorder a QR after
every column: a blocking node at ε = 1e-6 spreads a frame by ≈ 4/ε² (condition number
of its block), so no fixed longer interval is safe, and this is the only safe plain
schedule.
"""

from __future__ import annotations

import math

import numpy as np

QR_EVERY = 8


def _node_tables(x: float, epsilon: float) -> tuple[np.ndarray, np.ndarray]:
    """``cosh θ``, ``sinh θ`` per ``[sublattice, kind]`` (kinds: normal, blocking, open)."""
    c = np.empty((2, 3))
    s = np.empty((2, 3))
    for half, sign in ((0, 1.0), (1, -1.0)):
        sh = math.exp(sign * x)
        c[half] = (math.sqrt(1 + sh * sh), 1 / epsilon, 1.0)
        s[half] = (sh, math.sqrt((1 - epsilon) * (1 + epsilon)) / epsilon, 0.0)
    return c, s


def baseline_spectrum(
    width: int,
    x: float,
    layers: int,
    *,
    strips: int = 8,
    seed: int = 0,
    warmup: int = 0,
    p_block: float = 0.0,
    p_open: float = 0.0,
    epsilon: float = 1e-6,
) -> np.ndarray:
    """``(strips, width)`` per-layer exponents of the network strip."""
    rng = np.random.default_rng(seed)
    n, nl = width, 2 * width
    disorder = p_block > 0 or p_open > 0
    c_tab, s_tab = _node_tables(x, epsilon)
    f = rng.standard_normal((strips, nl, n)) + 1j * rng.standard_normal((strips, nl, n))
    f = np.linalg.qr(f)[0]
    acc = np.zeros((strips, n))
    measuring = [False]

    def column(f, c, s):
        a, b = f[:, 0::2], f[:, 1::2]
        new_a = c * a + s * b
        new_b = s * a + c * b
        f[:, 0::2] = new_a
        f[:, 1::2] = new_b
        return f

    def qr(f):
        q, r = np.linalg.qr(f)
        if measuring[0]:
            acc[...] += np.log(np.abs(np.diagonal(r, axis1=1, axis2=2)))
        return q

    def kinds(half):
        u = rng.random((strips, n, 1))
        pb, po = (p_block, p_open) if half == 0 else (p_open, p_block)
        return np.where(u < pb, 1, np.where(u < pb + po, 2, 0))

    total = warmup + layers
    for layer in range(total):
        measuring[0] = layer >= warmup
        ph = np.exp(2j * np.pi * rng.random((strips, 2 * nl)))
        if disorder:
            ka, kb = kinds(0), kinds(1)
            ca, sa, cb, sb = c_tab[0][ka], s_tab[0][ka], c_tab[1][kb], s_tab[1][kb]
        else:
            ca, sa, cb, sb = c_tab[0, 0], s_tab[0, 0], c_tab[1, 0], s_tab[1, 0]
        f = column(f, ca, sa)
        f *= ph[:, :nl, None]
        if disorder:
            f = qr(f)
        g = np.roll(f, -1, axis=1)  # pairs (2j+1, 2j+2) become (2j, 2j+1)
        g = column(g, cb, sb)
        f = np.roll(g, 1, axis=1)
        f *= ph[:, nl:, None]
        if disorder or (layer + 1) % QR_EVERY == 0 or layer + 1 == total:
            f = qr(f)
    return acc / layers
