"""An independent strip computation in extended precision ([K8] of tests/REFERENCES.md).

It shares nothing with the kernel's arithmetic: node coefficients are computed here in
``numpy.longdouble`` (64-bit significand on x86-64, unit roundoff ``u ≈ 5.4e-20``
against ``1.1e-16`` for float64), phases are ``cos/sin`` in long double, each column of
nodes is applied by plain array arithmetic, and the frame is re-orthonormalised after
*every* column by modified Gram–Schmidt, done twice. Only the random content is taken
from the kernel's public ``draw_layers`` and the same ``PCG64`` stream, in the order
``StripState.start`` uses (initial Gaussian matrix, then the layers), so for one seed
both codes see the same disorder realisation and start from the same flag of subspaces
(Gram–Schmidt and Householder give the same spans); their per-strip exponents then
differ by rounding only.

Node blocks. The block ``[[c, s], [s, c]]`` (``c = cosh θ``, ``s = sinh θ``) is applied
as ``a' = c(a + b) − d·b``, ``b' = c(a + b) − d·a`` with ``d = c − s = e^{−θ}`` computed
without cancellation (``d = t/(1 + r)``). This is the same matrix; it only keeps the
contracting eigenvalue ``e^{−θ}`` accurate to ``u`` where forming ``c − s`` from rounded
``c`` and ``s`` would leave it with a relative error ``~u·e^{2θ} ≈ 4u/ε²``.
"""

from __future__ import annotations

import numpy as np

from sweepctl.kernel import NetworkModel, draw_layers
from sweepctl.kernel.network import BLOCKING, NORMAL, OPEN

LD = np.longdouble
#: Layers drawn per call of ``draw_layers`` (memory only; the stream does not depend on it).
_CHUNK = 512


def node_coefficients(model: NetworkModel, real=LD) -> tuple[np.ndarray, np.ndarray]:
    """``(c, d)`` per ``[sublattice, kind]`` in long double: ``c = cosh θ``, ``d = e^{−θ}``.

    From the conventions: ``sinh θ_A = e^{x}``, ``sinh θ_B = e^{−x}``; a blocking node has
    ``t = ε`` (``cosh θ = 1/ε``, ``sinh θ = √(1 − ε²)/ε``); an open node ``θ = 0``.
    """
    c = np.empty((2, 3), dtype=real)
    d = np.empty((2, 3), dtype=real)
    eps = real(model.epsilon)
    for half, sign in ((0, 1), (1, -1)):
        s = np.exp(real(sign) * real(model.x))
        c[half, NORMAL] = np.sqrt(1 + s * s)
        d[half, NORMAL] = 1 / (c[half, NORMAL] + s)
        c[half, BLOCKING] = 1 / eps
        d[half, BLOCKING] = eps / (1 + np.sqrt((1 - eps) * (1 + eps)))
        c[half, OPEN] = 1
        d[half, OPEN] = 1
    return c, d


def _mgs(frame: np.ndarray) -> np.ndarray:
    """Modified Gram–Schmidt on ``(S, n, m)`` in place; returns ``|R_kk|``, ``(S, m)``.

    Column ``k`` is normalised, then projected out of every later column at once (the
    right-looking order of MGS: the same operations as projecting column by column).
    """
    m = frame.shape[2]
    norms = np.empty((frame.shape[0], m), dtype=frame.real.dtype)
    for k in range(m):
        v = frame[:, :, k : k + 1]
        vh = np.conj(v).transpose(0, 2, 1)
        nrm = np.sqrt((vh @ v).real)
        norms[:, k] = nrm[:, 0, 0]
        v /= nrm
        if k + 1 < m:
            rest = frame[:, :, k + 1 :]
            rest -= v @ ((vh / nrm) @ rest)
    return norms


def orthonormalise(frame: np.ndarray) -> np.ndarray:
    """Gram–Schmidt twice ("twice is enough"); ``log|R_kk|`` of the product ``R₂R₁``."""
    return np.log(_mgs(frame) * _mgs(frame))


def reference_exponents(
    model: NetworkModel,
    *,
    strips: int,
    seed: int,
    warmup: int,
    layers: int,
    full: bool = False,
    real=LD,
) -> np.ndarray:
    """Per-layer exponents ``(strips, M)`` of the strips ``StripState.start`` would run.

    ``warmup`` layers are applied and discarded (the frame is orthonormal at their end),
    then ``layers`` are accumulated: ``(1/L) Σ log|R_kk|`` over a QR after every column.
    ``real=numpy.float64`` runs the same algorithm in double precision (to show that a
    discrepancy comes from the precision, not from the re-orthogonalisation schedule).
    """
    cplx = np.result_type(real, np.complex64)
    two_pi = 8 * np.arctan(real(1))
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)))
    n, nl = model.width, model.links
    m = nl if full else n
    shape = (strips, nl, m)
    start = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    frame = start.astype(cplx)
    orthonormalise(frame)
    c_tab, d_tab = node_coefficients(model, real)
    pairs = [(np.arange(n) * 2 + half, (np.arange(n) * 2 + half + 1) % nl) for half in range(2)]
    acc = np.zeros((strips, m), dtype=real)
    done, total = 0, warmup + layers
    while done < total:
        k = min(_CHUNK, total - done)
        if done < warmup:
            k = min(k, warmup - done)
        draws = draw_layers(model, rng, k, strips)
        if model.phase_disorder:
            ang = two_pi * draws.uniforms[:, :, : 2 * nl].astype(real)
            phases = (np.cos(ang) + 1j * np.sin(ang)).astype(cplx)
        else:
            phases = np.ones((k, strips, 2 * nl), dtype=cplx)
        for layer in range(k):
            for half in range(2):
                ia, ib = pairs[half]
                kinds = draws.kinds[layer, :, half * n : (half + 1) * n]
                c = c_tab[half][kinds][:, :, None]
                d = d_tab[half][kinds][:, :, None]
                a, b = frame[:, ia, :], frame[:, ib, :]
                q = c * (a + b)
                ph = phases[layer, :, half * nl : (half + 1) * nl]
                frame[:, ia, :] = ph[:, ia, None] * (q - d * b)
                frame[:, ib, :] = ph[:, ib, None] * (q - d * a)
                logr = orthonormalise(frame)
                if done + layer >= warmup:
                    acc += logr
        done += k
    return (acc / layers).astype(np.float64)
