"""Compiled inner loops of the transfer-matrix kernel (numba, no Python objects).

There is one code path: these loops are the only implementation of the layer
update. They do plain IEEE arithmetic in a fixed order without ``fastmath``, so
their results do not depend on the SIMD width the compiler picks.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["apply_columns", "classify_nodes", "column_bounds", "unit_phases"]

_TABLE_BITS = 8
_TABLE_SIZE = 1 << _TABLE_BITS
_ANGLES = 2.0 * np.pi * np.arange(_TABLE_SIZE) / _TABLE_SIZE
_COS_TABLE = np.cos(_ANGLES)
_SIN_TABLE = np.sin(_ANGLES)


@numba.njit(cache=True, nogil=True, boundscheck=False)
def unit_phases(u, cos_out, sin_out):  # pragma: no cover - compiled
    """``cos(2πu)``, ``sin(2πu)`` for ``u`` in ``[0, 1)``, elementwise on ``(K, S, m)``.

    ``2πu`` is split into a table angle ``2πi/256`` and a remainder ``r < 2π/256``
    whose sine and cosine are degree-9/8 Taylor polynomials (truncation error
    below ``r^{10}/10! < 1e-22``), recombined by the addition theorem. Accurate to
    a few ulp and, unlike a call into libm per element, vectorisable.
    """
    two_pi = 2.0 * math.pi
    for k in range(cos_out.shape[0]):
        for s_ in range(cos_out.shape[1]):
            for j in range(cos_out.shape[2]):  # u may have further columns: not read
                y = u[k, s_, j] * _TABLE_SIZE  # exact: power-of-two scaling
                i = int(y)
                r = two_pi * ((y - i) / _TABLE_SIZE)
                r2 = r * r
                cr = 1.0 + r2 * (-0.5 + r2 * (1.0 / 24 + r2 * (-1.0 / 720 + r2 * (1.0 / 40320))))
                sr = r * (
                    1.0 + r2 * (-1.0 / 6 + r2 * (1.0 / 120 + r2 * (-1.0 / 5040 + r2 / 362880)))
                )
                i &= _TABLE_SIZE - 1
                ca = _COS_TABLE[i]
                sa = _SIN_TABLE[i]
                cos_out[k, s_, j] = ca * cr - sa * sr
                sin_out[k, s_, j] = sa * cr + ca * sr


@numba.njit(cache=True, nogil=True, boundscheck=False, fastmath={"contract"})
def apply_columns(frame, kinds, pcos, psin, table, col0, col1, scratch):  # pragma: no cover
    """Apply node columns ``col0 <= c < col1`` of a chunk to every strip's frame, in place.

    Parameters
    ----------
    frame
        float64 view of the complex frame, shape ``(S, 2N, 2M)`` (real and imaginary
        parts interleaved along the last axis).
    kinds
        int8 ``(K, S, 2N)``: node kinds, A nodes then B nodes, per layer.
    pcos, psin
        float64 ``(K, S, 4N)``: link phases after the A column, then after the B
        column (all ones / zeros for the clean periodic network).
    table
        ``(2, 3, 2)`` node coefficients ``[sublattice, kind, (cosh θ, sinh θ)]``.
    col0, col1
        Column range within the chunk; column ``c`` is layer ``c // 2``, sublattice
        ``c % 2`` (0 = A on pairs ``(2j, 2j+1)``, 1 = B on ``(2j+1, 2j+2 mod 2N)``).
    scratch
        float64 ``(2, 2M)`` work rows.

    The node block has real coefficients, so it acts on the ``2M`` interleaved reals of
    a row pair as one contiguous loop (vectorised by the compiler); the phases then
    multiply each row in a second pass over the scratch rows. The arithmetic, and
    hence every bit, is the same as one fused loop over complex entries, which the
    compiler did not vectorise (2.5× slower at N = 64, measured).
    """
    n_strips = frame.shape[0]
    n_links = frame.shape[1]
    n = n_links // 2
    width = frame.shape[2]
    m_cols = width // 2
    ta = scratch[0]
    tb = scratch[1]
    for s_ in range(n_strips):
        for col in range(col0, col1):
            layer = col >> 1
            half = col & 1
            for j in range(n):
                kind = kinds[layer, s_, half * n + j]
                c = table[half, kind, 0]
                s = table[half, kind, 1]
                ia = 2 * j + half
                ib = ia + 1
                if ib == n_links:
                    ib = 0
                pa = half * n_links + ia
                pb = half * n_links + ib
                car = pcos[layer, s_, pa]
                cai = psin[layer, s_, pa]
                cbr = pcos[layer, s_, pb]
                cbi = psin[layer, s_, pb]
                xa = frame[s_, ia]
                xb = frame[s_, ib]
                for r in range(width):
                    a = xa[r]
                    b = xb[r]
                    ta[r] = c * a + s * b
                    tb[r] = s * a + c * b
                for m in range(m_cols):
                    tr = ta[2 * m]
                    ti = ta[2 * m + 1]
                    xa[2 * m] = car * tr - cai * ti
                    xa[2 * m + 1] = car * ti + cai * tr
                for m in range(m_cols):
                    vr = tb[2 * m]
                    vi = tb[2 * m + 1]
                    xb[2 * m] = cbr * vr - cbi * vi
                    xb[2 * m + 1] = cbr * vi + cbi * vr


@numba.njit(cache=True, nogil=True, boundscheck=False)
def classify_nodes(u, off, n, p_block, p_open, kinds):  # pragma: no cover - compiled
    """Node kinds from their uniform variates, in place (no temporaries).

    A node (columns ``off .. off+n`` of ``u``) is blocking if ``v < p_block``, open if
    ``v < p_block + p_open``; a B node (``off+n .. off+2n``) swaps the roles.
    """
    both = p_block + p_open
    for k in range(u.shape[0]):
        for s in range(u.shape[1]):
            for j in range(n):
                va = u[k, s, off + j]
                kinds[k, s, j] = 1 if va < p_block else (2 if va < both else 0)
                vb = u[k, s, off + n + j]
                kinds[k, s, n + j] = 1 if vb < p_open else (2 if vb < both else 0)


@numba.njit(cache=True, nogil=True, boundscheck=False)
def column_bounds(kinds, growth, bounds, counts, measuring):  # pragma: no cover - compiled
    """Per column: the largest ``growth[sublattice, kind]`` over nodes and strips.

    Also adds the node-kind counts per strip to ``counts`` (``(S, 2, 3)``) when
    ``measuring``.
    """
    n = kinds.shape[2] // 2
    for k in range(kinds.shape[0]):
        for half in range(2):
            best = 0
            for s in range(kinds.shape[1]):
                for j in range(n):
                    kind = kinds[k, s, half * n + j]
                    g = growth[half, kind]
                    if g > best:
                        best = g
                    if measuring:
                        counts[s, half, kind] += 1
            bounds[2 * k + half] = best
