"""Householder re-orthogonalisation of a batch of frames through LAPACK.

LAPACK's ``zgeqrf`` (Householder QR) and ``zungqr`` (explicit ``Q``) are called
from compiled code for every frame of the batch, through the function pointers
SciPy exports in ``scipy.linalg.cython_lapack``. That removes the per-frame Python
call overhead and the wrapper's layout copies, which for the thin ``2N × N``
frames used here cost as much as the factorisation itself at small ``N``
(measured: 2.3 ms for 8 frames of 128 × 64 through the batched ``numpy.linalg.qr``
against 1.2 ms here, one thread).
"""

from __future__ import annotations

import ctypes
import threading

import llvmlite.binding as llvm_binding
import numba
import numpy as np
from numba import types
from scipy.linalg import cython_blas, cython_lapack

from sweepctl.kernel._loops import apply_columns
from sweepctl.kernel.schedule import ETA_MAX

__all__ = ["advance_scheduled", "reorthogonalise"]


def _lapack_address(name: str, module=cython_lapack) -> int:
    capsule = module.__pyx_capi__[name]
    get_name = ctypes.pythonapi.PyCapsule_GetName
    get_name.restype = ctypes.c_char_p
    get_name.argtypes = [ctypes.py_object]
    get_pointer = ctypes.pythonapi.PyCapsule_GetPointer
    get_pointer.restype = ctypes.c_void_p
    get_pointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
    return int(get_pointer(capsule, get_name(capsule)))


# Symbols are bound at import, before any cached machine code is loaded; arguments
# are passed as addresses (Fortran passes everything by reference).
llvm_binding.add_symbol("sweepctl_zgeqrf", _lapack_address("zgeqrf"))
llvm_binding.add_symbol("sweepctl_zungqr", _lapack_address("zungqr"))
llvm_binding.add_symbol("sweepctl_zpotrf", _lapack_address("zpotrf"))
llvm_binding.add_symbol("sweepctl_zherk", _lapack_address("zherk", cython_blas))
llvm_binding.add_symbol("sweepctl_cherk", _lapack_address("cherk", cython_blas))
llvm_binding.add_symbol("sweepctl_ztrsm", _lapack_address("ztrsm", cython_blas))
_zgeqrf = types.ExternalFunction("sweepctl_zgeqrf", types.void(*([types.intp] * 8)))
_zungqr = types.ExternalFunction("sweepctl_zungqr", types.void(*([types.intp] * 9)))
_zpotrf = types.ExternalFunction("sweepctl_zpotrf", types.void(*([types.intp] * 5)))
_zherk = types.ExternalFunction("sweepctl_zherk", types.void(*([types.intp] * 10)))
_cherk = types.ExternalFunction("sweepctl_cherk", types.void(*([types.intp] * 10)))
_ztrsm = types.ExternalFunction("sweepctl_ztrsm", types.void(*([types.intp] * 11)))

_INT_BYTES = 4  # SciPy's LAPACK uses 32-bit integers (LP64)


@numba.njit(cache=True, nogil=True, boundscheck=False)
def _householder_strip(frame, s, logd, col_major, tau, work, ints):  # pragma: no cover
    """Householder QR (``zgeqrf`` + ``zungqr``) of ``frame[s]``, in place."""
    rows, cols = frame.shape[1], frame.shape[2]
    p = ints.ctypes.data
    a_ptr = col_major.ctypes.data
    for j in range(cols):  # to column-major: col_major[j, i] = A[i, j]
        for i in range(rows):
            col_major[j, i] = frame[s, i, j]
    ints[5] = 0
    _zgeqrf(
        p,
        p + _INT_BYTES,
        a_ptr,
        p + 3 * _INT_BYTES,
        tau.ctypes.data,
        work.ctypes.data,
        p + 4 * _INT_BYTES,
        p + 5 * _INT_BYTES,
    )
    if ints[5] != 0:
        return ints[5]
    for i in range(cols):
        logd[s, i] = np.log(np.abs(col_major[i, i]))
    _zungqr(
        p,
        p + _INT_BYTES,
        p + 2 * _INT_BYTES,
        a_ptr,
        p + 3 * _INT_BYTES,
        tau.ctypes.data,
        work.ctypes.data,
        p + 4 * _INT_BYTES,
        p + 5 * _INT_BYTES,
    )
    if ints[5] != 0:
        return ints[5]
    for i in range(rows):
        for j in range(cols):
            frame[s, i, j] = col_major[j, i]
    return 0


@numba.njit(cache=True, nogil=True, boundscheck=False)
def _cholesky_strip(  # pragma: no cover - compiled
    frame, s, logd, backup, gram, sums, ints, chars, reals, one, accept, read_out, single, reals32
):
    """CholeskyQR of ``frame[s]`` with its orthogonality certificate; ``True`` if accepted.

    The C-ordered ``2N × M`` frame ``A`` is, to Fortran, the ``M × 2N`` matrix ``B = A^T``,
    so no transposed copy is made: ``B B^H = conj(A^H A)`` (``zherk``), whose Cholesky
    factor is ``conj(R)`` (``zpotrf``; same real diagonal), and ``W^T = R^{-T} B =
    conj(R)^{-H} B`` (``ztrsm``, left, conjugate transpose). A second ``zherk`` gives
    ``conj(W^H W)``, whose entries have the moduli of ``W^H W``'s, for ``η``. Returns
    ``False`` (``frame[s]`` restored from ``backup``) if Cholesky breaks down or
    ``η > accept``. With ``single`` (a ``(rows + cols, cols)`` complex64 array, or an
    empty one for double precision; ``reals32`` holds float32 1 and 0) the
    certificate's Gram matrix is formed in single precision from a rounded copy of
    ``W`` (``cherk``, half the time of ``zherk``);
    ``accept`` must then allow for that rounding (:func:`_accept_threshold`). The
    frame, ``R`` and the read-out are unchanged: double precision throughout.
    """
    cols = frame.shape[2]
    p = ints.ctypes.data
    c = chars.ctypes.data  # 'U', 'N', 'C', 'L'
    r = reals.ctypes.data  # 1.0, 0.0
    b_ptr = frame[s].ctypes.data
    g_ptr = gram.ctypes.data
    backup[:, :] = frame[s]
    ldb = p + 6 * _INT_BYTES  # = cols; ints: rows, cols, cols, rows, lwork, info, cols
    _zherk(c, c + 1, p + _INT_BYTES, p, r, b_ptr, ldb, r + 8, g_ptr, ldb)
    ints[5] = 0
    _zpotrf(c, p + _INT_BYTES, g_ptr, ldb, p + 5 * _INT_BYTES)
    if ints[5] != 0:
        return False
    for i in range(cols):
        logd[s, i] = np.log(gram[i, i].real)  # zpotrf: real and positive
    _ztrsm(c + 3, c, c + 2, c + 1, p + _INT_BYTES, p, one.ctypes.data, g_ptr, ldb, b_ptr, ldb)
    if single.size and not read_out:
        # W rounded to complex64 in the first `rows` rows of `single` (the frame's
        # layout), the single-precision Gram matrix in the `cols` rows after them.
        rows = frame.shape[1]
        w32 = single[:rows]
        g32 = single[rows:]
        src = frame[s]
        for i in range(rows):
            for j in range(cols):
                w32[i, j] = src[i, j]
        r32 = reals32.ctypes.data
        w_ptr = w32.ctypes.data
        _cherk(c, c + 1, p + _INT_BYTES, p, r32, w_ptr, ldb, r32 + 4, g32.ctypes.data, ldb)
        for j in range(cols):
            for i in range(j + 1):
                gram[j, i] = g32[j, i]
    else:
        _zherk(c, c + 1, p + _INT_BYTES, p, r, b_ptr, ldb, r + 8, g_ptr, ldb)
    # η = max_j Σ_i |Re| + |Im| of (W^H W − I)_ij, which bounds the 1-norm of that
    # Hermitian matrix and so its 2-norm. The upper triangle is stored, Fortran element
    # (i, j), i ≤ j, at gram[j, i]: read row by row, each off-diagonal entry counts for
    # columns i and j. NaN fails the test below.
    for j in range(cols):
        sums[j] = 0.0
    for j in range(cols):
        row = gram[j]
        acc = abs(row[j].real - 1.0) + abs(row[j].imag)
        for i in range(j):
            v = abs(row[i].real) + abs(row[i].imag)
            acc += v
            sums[i] += v
        sums[j] += acc
    eta = 0.0
    for j in range(cols):
        v = sums[j]
        if v > eta or v != v:
            eta = v
    if not eta <= accept:
        frame[s] = backup
        return False
    if read_out:
        # The read-out needs the R of A itself: A = W R, W = Q S with S = chol(W^H W),
        # so diag R_A = diag S · diag R (gram holds conj(W^H W); same real diagonal).
        ints[5] = 0
        _zpotrf(c, p + _INT_BYTES, g_ptr, ldb, p + 5 * _INT_BYTES)
        if ints[5] != 0:
            frame[s] = backup
            return False
        for i in range(cols):
            logd[s, i] += np.log(gram[i, i].real)
    return True


@numba.njit(cache=True, nogil=True, boundscheck=False)
def _qr_batch(
    frame, logd, col_major, tau, work, gram, backup, single, cholesky, accept, fallbacks, read_out
):  # pragma: no cover
    n_strips, rows, cols = frame.shape
    ints = np.empty(7, dtype=np.int32)  # m, n, k, lda, lwork, info, ldg
    ints[0] = rows
    ints[1] = cols
    ints[2] = cols
    ints[3] = rows
    ints[4] = work.size
    ints[6] = cols
    chars = np.empty(4, dtype=np.uint8)
    chars[0] = 85  # U
    chars[1] = 78  # N
    chars[2] = 67  # C
    chars[3] = 76  # L
    reals = np.empty(2)
    reals[0] = 1.0
    reals[1] = 0.0
    reals32 = np.zeros(2, dtype=np.float32)
    reals32[0] = 1.0
    one = np.ones(1, dtype=np.complex128)
    sums = np.empty(cols)
    for s in range(n_strips):
        if cholesky:
            if _cholesky_strip(
                frame,
                s,
                logd,
                backup,
                gram,
                sums,
                ints,
                chars,
                reals,
                one,
                accept,
                read_out,
                single,
                reals32,
            ):
                continue
            fallbacks[0] += 1
        info = _householder_strip(frame, s, logd, col_major, tau, work, ints)
        if info != 0:
            return info
    return 0


_local = threading.local()


def _workspace(rows: int, cols: int) -> tuple[np.ndarray, ...]:
    """Per-thread scratch arrays, reused: fresh ones each call are slow under Dask's
    low ``MALLOC_TRIM_THRESHOLD_``."""
    cache = getattr(_local, "cache", None)
    if cache is None:
        cache = _local.cache = {}
    key = (rows, cols)
    if key not in cache:
        if len(cache) > 8:
            cache.clear()
        # The blocked algorithm only pays from 128 columns (LAPACK's crossover);
        # below that the minimal workspace measured faster.
        lwork = max(1, (32 if cols >= 128 else 3) * cols)
        cache[key] = (
            np.empty((cols, rows), dtype=np.complex128),
            np.empty(cols, dtype=np.complex128),
            np.empty(lwork, dtype=np.complex128),
            np.zeros((cols, cols), dtype=np.complex128),
            np.empty((rows, cols), dtype=np.complex128),
            np.empty((rows + cols if single_certificate(rows, cols) else 0, cols), np.complex64),
        )
    return cache[key]


def _accept_threshold(rows: int, cols: int, single: bool = False) -> float:
    """:data:`ETA_MAX` less the rounding of the computed certificate ``η``.

    Derived (precision ``u``; ``γ_k = k u / (1 − k u)``, [M10] tests/REFERENCES.md): the
    real and the imaginary part of an entry of ``W^H W`` are each a real dot product of
    length ``2·rows``, in whatever order the BLAS sums, so the computed entry is off by
    ``|Re| + |Im| ≤ 2 γ_{2 rows} ||w_i|| ||w_j|| ≤ 2 γ_{2 rows} (1 + η)`` (columns of
    squared norm ``1 + (W^H W − I)_ii``). With ``single``, ``W`` is first rounded to
    complex64 (each part relatively by ``u``), which moves the entry by a modulus
    ``≤ (2u + u²)(1 + η)``, so ``|Re| + |Im| ≤ √2 (2u + u²)(1 + η)``, and the dot
    products see norms larger by ``1 + u``; gradual underflow adds at most
    ``2^-149`` per rounding, ``4 (rows + 1) 2^-149`` per entry. A column of the
    certificate sums ``cols`` entries: ``η_true ≤ η + cols δ (1 + η_true)``, so
    ``η ≤ ETA_MAX − cols δ (1 + ETA_MAX)`` implies ``η_true ≤ ETA_MAX``. The double
    sums that form ``η`` round by a relative ``γ_cols`` in double: also subtracted, and
    the threshold itself, computed in double, is lowered by ``4 u`` relative. On the
    diagonal ``Re − 1`` is exact (Sterbenz, near 1). Assumes IEEE gradual underflow (no
    flush-to-zero), as numba without ``fastmath`` and the reference BLAS kernels give.
    """
    u64 = np.finfo(np.float64).eps / 2
    u = np.finfo(np.float32).eps / 2 if single else u64
    gamma = 2 * rows * u / (1.0 - 2 * rows * u)
    delta = 2.0 * gamma
    tiny = 0.0
    if single:
        delta = 2.0 * gamma * (1.0 + u) ** 2 + np.sqrt(2.0) * (2.0 * u + u * u)
        tiny = 4.0 * (rows + 1) * 2.0**-149
    sums = cols * u64 / (1.0 - cols * u64) * ETA_MAX
    return float((ETA_MAX - cols * (delta * (1.0 + ETA_MAX) + tiny) - sums) * (1.0 - 4 * u64))


def single_certificate(rows: int, cols: int) -> bool:
    """Whether the certificate is formed in single precision for ``rows × cols`` frames:
    when its rounding leaves at least half of :data:`ETA_MAX` (up to ``N = 178`` for
    ``rows = 2N``, ``cols = N``); wider frames use double precision. Half the cost of
    the certificate's ``zherk`` (``cherk``), measured 369 µs against 192 µs (N = 128)."""
    return _accept_threshold(rows, cols, single=True) >= 0.5 * ETA_MAX


def reorthogonalise(
    frame: np.ndarray,
    *,
    cholesky: bool = False,
    fallbacks: np.ndarray | None = None,
    read_out: bool = False,
) -> np.ndarray:
    """Replace each frame by the ``Q`` of a QR factorisation, in place.

    Parameters
    ----------
    frame
        complex128 ``(S, m, n)``, ``m >= n``, C-contiguous.
    cholesky
        ``False``: Householder QR (``zgeqrf`` + ``zungqr``), ``Q`` orthonormal to
        rounding. ``True``: CholeskyQR [1]_ with an a-posteriori certificate: ``G = A^H
        A``, ``R = chol(G)``, ``W = A R^{-1}``, then an upper bound ``η`` of ``||W^H W −
        I||_1`` (sum of ``|Re| + |Im|``). A strip is accepted only if the Cholesky
        factorisation succeeded and ``η ≤ ETA_MAX`` less the rounding of that check;
        otherwise it is redone by Householder from the untouched input. The decision
        depends on the frame's values only (deterministic, independent of timing and
        of the batch). ``W`` is orthonormal only up to ``η``: ``cond(W) ≤ √((1+η)/(1−η))``
        (``schedule.ORTHO_RESERVE`` in the log), counted in the next interval's bound.
        ``W R = A + E`` with ``||E||_F ≤ γ_n n √(1+η) ||A||_2`` (derived: row-wise
        backward error of the triangular solve), so the product of the ``R`` factors
        telescopes as for Householder: ``W``'s triangular defect cancels in the next
        factorisation (engine module docstring).
    fallbacks
        Optional int64 array of one element, incremented per strip that fell back.
    read_out
        With ``cholesky``: return the diagonal of ``A``'s own ``R`` (as Householder
        would), not of the CholeskyQR factor whose defect the next factorisation
        telescopes: ``W = Q S`` with ``S = chol(W^H W)`` from the certificate's Gram
        matrix (one more ``zpotrf``), and ``log|R_ii| + log S_ii`` is returned. For a
        read-out, after which no factorisation follows.

    Returns
    -------
    numpy.ndarray
        ``log|R_ii|``, shape ``(S, n)``. LAPACK does not make ``R``'s diagonal
        positive, hence the modulus ([M4] tests/REFERENCES.md); Cholesky's is positive.

    References
    ----------
    .. [1] [M9] tests/REFERENCES.md (CholeskyQR; Yamamoto et al. 2015, Fukaya et al.
       2020).
    """
    if frame.dtype != np.complex128 or not frame.flags.c_contiguous or frame.ndim != 3:
        raise ValueError("frame must be a C-contiguous complex128 array (S, m, n)")
    n_strips, rows, cols = frame.shape
    if rows < cols:
        raise ValueError(f"frame has fewer rows ({rows}) than columns ({cols})")
    logd = np.empty((n_strips, cols))
    col_major, tau, work, gram, backup, single = _workspace(rows, cols)
    if fallbacks is None:
        fallbacks = np.zeros(1, dtype=np.int64)
    # the read-out forms its Gram matrix in double (it needs S = chol(W^H W))
    accept = _accept_threshold(rows, cols, single=bool(single.size) and not read_out)
    info = _qr_batch(
        frame,
        logd,
        col_major,
        tau,
        work,
        gram,
        backup,
        single,
        cholesky,
        accept,
        fallbacks,
        read_out,
    )
    if info != 0:  # pragma: no cover - LAPACK argument error
        raise RuntimeError(f"LAPACK QR failed with info={info}")
    return logd


@numba.njit(cache=True, nogil=True, boundscheck=False)
def _advance_scheduled(  # pragma: no cover - compiled
    frame,
    kinds,
    pcos,
    psin,
    table,
    bounds,
    rows,
    growth,
    budget,
    log_sum,
    measuring,
    logd,
    col_major,
    tau,
    work,
    gram,
    backup,
    single,
    cholesky,
    accept,
    fallbacks,
):
    """Apply a chunk's columns with the re-orthogonalisation schedule, all in compiled code.

    The rule (mirrored by ``schedule._count``): before a column whose bound would take the
    accumulated growth above ``budget``, do a QR if anything was applied since the last
    one; a single column above the budget is applied alone. Columns between QRs are
    applied as one range (per strip the same arithmetic as one at a time). Returns
    ``(growth, QRs done)``; a negative QR count is a LAPACK error code.
    """
    view = frame.view(np.float64)
    n_cols = bounds.size
    qrs = 0
    col = 0
    while col < n_cols:
        end = col
        acc = growth
        while end < n_cols and acc + bounds[end] <= budget:
            acc += bounds[end]
            end += 1
        if end == col:
            if growth > 0:
                info = _qr_batch(
                    frame,
                    logd,
                    col_major,
                    tau,
                    work,
                    gram,
                    backup,
                    single,
                    cholesky,
                    accept,
                    fallbacks,
                    False,
                )
                if info != 0:
                    return growth, -abs(info)
                qrs += 1
                if measuring:
                    for s in range(log_sum.shape[0]):
                        for i in range(log_sum.shape[1]):
                            log_sum[s, i] += logd[s, i]
                growth = 0
                continue
            end = col + 1
            acc = growth + bounds[col]
        apply_columns(view, kinds, pcos, psin, table, col, end, rows)
        growth = acc
        col = end
    return growth, qrs


def advance_scheduled(
    frame,
    kinds,
    pcos,
    psin,
    table,
    bounds,
    rows,
    growth,
    budget,
    log_sum,
    measuring,
    cholesky,
    fallbacks,
) -> tuple[int, int]:
    """Python entry to :func:`_advance_scheduled` with this thread's QR workspace."""
    n_strips, n_rows, cols = frame.shape
    col_major, tau, work, gram, backup, single = _workspace(n_rows, cols)
    logd = np.empty((n_strips, cols))
    growth, qrs = _advance_scheduled(
        frame,
        kinds,
        pcos,
        psin,
        table,
        bounds,
        rows,
        int(growth),
        int(budget),
        log_sum,
        bool(measuring),
        logd,
        col_major,
        tau,
        work,
        gram,
        backup,
        single,
        bool(cholesky),
        _accept_threshold(n_rows, cols, single=bool(single.size)),
        fallbacks,
    )
    if qrs < 0:  # pragma: no cover - LAPACK argument error
        raise RuntimeError(f"LAPACK QR failed with info={-qrs}")
    return int(growth), int(qrs)
