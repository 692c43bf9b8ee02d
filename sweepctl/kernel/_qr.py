"""Householder re-orthogonalisation of a batch of frames through LAPACK.

``zgeqrf`` + ``zungqr`` per frame with the optimal (blocked) workspace, called
directly: for the thin ``2N × N`` frames used here this is about twice as fast as
the batched ``numpy.linalg.qr``, whose per-call workspace handling dominates.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy.linalg import lapack

__all__ = ["reorthogonalise"]


@lru_cache(maxsize=64)
def _lwork(rows: int, cols: int, dtype: str) -> tuple[int, int]:
    a = np.zeros((rows, cols), dtype=dtype)
    geqrf, ungqr = lapack.get_lapack_funcs(("geqrf", "ungqr"), (a,))
    _, _, work, _ = geqrf(a, lwork=-1)
    lw_qr = max(int(work[0].real), 1)
    tau = np.zeros(min(rows, cols), dtype=dtype)
    _, work, _ = ungqr(a, tau, lwork=-1)
    lw_q = max(int(work[0].real), 1)
    return lw_qr, lw_q


def reorthogonalise(frame: np.ndarray) -> np.ndarray:
    """Replace each frame by the ``Q`` of its Householder QR, in place.

    Parameters
    ----------
    frame
        Array ``(S, m, n)`` with ``m >= n``, complex128 or float64, C-contiguous.

    Returns
    -------
    numpy.ndarray
        ``log|R_ii|``, shape ``(S, n)``. LAPACK does not make ``R``'s diagonal
        positive, hence the modulus (numpy.linalg.qr documentation).
    """
    n_strips, rows, cols = frame.shape
    geqrf, ungqr = lapack.get_lapack_funcs(("geqrf", "ungqr"), (frame[0],))
    lw_qr, lw_q = _lwork(rows, cols, frame.dtype.str)
    out = np.empty((n_strips, cols))
    for s in range(n_strips):
        qr, tau, _, info = geqrf(frame[s], lwork=lw_qr, overwrite_a=False)
        if info != 0:  # pragma: no cover - LAPACK argument error
            raise RuntimeError(f"LAPACK geqrf failed with info={info}")
        out[s] = np.log(np.abs(np.diagonal(qr)))
        q, _, info = ungqr(qr, tau, lwork=lw_q, overwrite_a=True)
        if info != 0:  # pragma: no cover
            raise RuntimeError(f"LAPACK ungqr failed with info={info}")
        frame[s] = q
    return out
