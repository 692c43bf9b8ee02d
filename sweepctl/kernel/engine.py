"""Lyapunov engine: a batch of strips advanced together, QR re-orthogonalisation.

The engine keeps, for each of ``S`` independent strips, a thin frame of ``M``
orthonormal columns (``M = N`` for the positive half of the spectrum, ``2N`` for the
whole) in ``C^{2N}``. Each layer's transfer matrix multiplies the frame; every few
columns the frame is replaced by the ``Q`` of its Householder QR and ``log|R_ii|``
is accumulated. After ``L`` measured layers ``γ_i = Σ log|R_ii| / L`` are the
Lyapunov exponents per layer, largest first [1]_, [2]_.

Re-orthogonalisation interval. A column of nodes has condition number
``e^{2 max θ}``; products multiply condition numbers, so the sum of ``2 max θ`` over
the columns applied since the last QR, plus the log condition number of the frame the
last QR left (at most ``ORTHO_RESERVE`` ≈ 0.031, below), bounds the log of the frame's
condition number ``κ``. A QR is done before a column would take that bound above
``ln(1e-3 / eps)`` (eps = double-precision unit roundoff), so ``u·κ ≤ 1e-3`` at every
QR. At ``p = 0``, ``x = 0`` that is a QR every 8 layers; with blocking nodes at
``ε = 1e-6`` one every column. The bound is kept in integer units so that the schedule,
and with it every bit of the result, is independent of how the layers are chunked.

QR method and accuracy. Scheduled QRs are CholeskyQR ([M9] tests/REFERENCES.md):
``G = A^H A``, ``R = chol(G)``, ``W = A R^{-1}``, all BLAS-3, followed by a certificate
``η ≥ ||W^H W − I||_2`` computed from a second Gram matrix (for frames up to
``N = 178`` in single precision from a rounded copy of ``W``, at half the cost, its
rounding subtracted from the threshold: [M10] tests/REFERENCES.md,
``_qr._accept_threshold``). The strip is accepted if the Cholesky factorisation
succeeded and ``η`` is within ``1/32`` less that rounding; otherwise that strip's frame is
redone by Householder QR (a decision on the data only, so deterministic and
independent of chunking). The guarantee is the same as with Householder throughout:

* Backward error. Householder gives ``QR = A + E`` with ``||E|| ≤ c u ||A||``;
  CholeskyQR gives ``WR = A + E`` with ``||E||_F ≤ γ_n n √(1+η) ||A||_2`` (derived: each
  row of ``W`` solves ``w R = a`` with ``|ΔR| ≤ γ_n |R|`` and ``||R||_2 = ||A||_2`` up to
  ``O(u)``), whatever ``κ(A)``. A normwise perturbation ``E`` moves each ``log R_ii`` by
  at most about ``||E||/σ_min(A) ≤ c' u κ ≤ c' · 1e-3`` (first order), the bound the
  schedule enforces.
* Non-orthonormal frames. ``W = Q_W S`` with ``S`` upper triangular, ``diag S = 1 +
  O(η)``. The engine accumulates ``diag R`` instead of ``diag (S R)``; the next
  factorisation of ``T W = T Q_W S`` returns ``R' = R_true' S`` whose diagonal carries
  ``diag S`` back, so ``Σ log R_ii`` telescopes to the exact accumulation. The read-out,
  after which nothing telescopes, adds the last ``S`` explicitly (``S = chol(W^H W)``
  from the certificate's Gram matrix, ``reorthogonalise(..., read_out=True)``). What
  remains of ``η`` is the frame's condition ``√((1+η)/(1−η))`` entering the next
  interval, which the schedule reserves. The warm-up's last QR (whose ``R`` is
  discarded) uses Householder, so no ``S`` is dropped there.

With ``κ ≈ 4e6`` after a blocking column at ``ε = 1e-6`` (measured, N = 16 and 64),
``u κ² ≈ 1e-3`` and the certificate passes with ``η ≈ 1e-3`` (fallback on 0.01–0.3 %
of strip-QRs); on the clean network ``κ ≈ 2e5`` after 8 layers and ``η ≈ 1e-6``.

References
----------
.. [1] G. Benettin, L. Galgani, A. Giorgilli, J.-M. Strelcyn, Meccanica 15, 9 (1980)
   ([M1] tests/REFERENCES.md).
.. [2] A. MacKinnon and B. Kramer, Z. Phys. B 53, 1 (1983) ([M1] tests/REFERENCES.md).
.. [3] Y. Yamamoto et al. (2015), T. Fukaya et al. (2020): CholeskyQR, CholeskyQR2 and
   shifted CholeskyQR3 ([M9] tests/REFERENCES.md).
"""

from __future__ import annotations

import io
import json
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from sweepctl import __version__
from sweepctl.kernel._loops import column_bounds, unit_phases
from sweepctl.kernel._qr import advance_scheduled, reorthogonalise
from sweepctl.kernel.network import NetworkModel, default_warmup, draw_layers
from sweepctl.kernel.schedule import GROWTH_SCALE, LOG_COND_BUDGET, budget_units, growth_units

__all__ = [
    "LOG_COND_BUDGET",
    "LyapunovResult",
    "PrecisionOutcome",
    "StripState",
    "advance_to_precision",
    "default_warmup",
    "lyapunov_spectrum",
    "product_spectrum",
]

#: Growth bounds are summed as integers in units of 2**-24 (exact, associative).
_GROWTH_SCALE = GROWTH_SCALE
_STATE_FORMAT = 2  # 2: CholeskyQR frames, budget net of the orthogonality reserve
#: Target number of uniform variates drawn per chunk (a few MB of memory).
_CHUNK_VARIATES = 400_000

SeedLike = int | np.random.SeedSequence


def _generator(seed: SeedLike) -> np.random.Generator:
    if isinstance(seed, np.random.SeedSequence):
        return np.random.Generator(np.random.PCG64(seed))
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        return np.random.Generator(np.random.PCG64(np.random.SeedSequence(int(seed))))
    raise ValueError(f"seed must be a non-negative int or a numpy SeedSequence, got {seed!r}")


@dataclass(frozen=True)
class LyapunovResult:
    """Exponents of a batch of strips after ``layers`` measured layers.

    Attributes
    ----------
    exponents
        ``(S, M)`` per-layer exponents of each strip in frame order (descending up
        to statistical fluctuation); ``M = N`` unless the full spectrum was asked.
    layers
        Measured layers (after the warm-up).
    width
        ``N``.
    sum_rule
        ``(S,)``: ``Σ -ln t`` over the nodes each strip actually went through, per
        layer. The sum of the ``N`` positive exponents of a strip converges to it
        (derived: Jensen's formula, uniform phases).
    """

    exponents: np.ndarray
    layers: int
    width: int
    sum_rule: np.ndarray

    @property
    def gamma(self) -> np.ndarray:
        """``(S,)``: the smallest positive exponent ``γ`` of each strip."""
        return self.exponents[:, self.width - 1]

    @property
    def Gamma_strips(self) -> np.ndarray:
        """``(S,)``: ``Γ = N·γ`` of each strip."""
        return self.width * self.gamma

    @property
    def Gamma(self) -> float:
        """Mean of ``Γ = N·γ`` over strips."""
        return float(np.mean(self.Gamma_strips))

    @property
    def Gamma_err(self) -> float:
        """Standard error of :attr:`Gamma` from the spread across strips (NaN for one strip)."""
        g = self.Gamma_strips
        if g.size < 2:
            return math.nan
        return float(np.std(g, ddof=1) / math.sqrt(g.size))


@dataclass
class StripState:
    """Everything needed to continue a batch of strips: frame, accumulators, RNG state.

    Create with :meth:`start`, move on with :meth:`advance`, read with
    :meth:`result`, and persist with :meth:`to_bytes` / :meth:`from_bytes`. A state
    restored from bytes continues bit-identically to one that was never saved.
    """

    model: NetworkModel
    strips: int
    warmup: int
    frame: np.ndarray
    log_sum: np.ndarray
    node_counts: np.ndarray
    layers_done: int
    growth_since_qr: int
    rng: np.random.Generator = field(repr=False)
    budget: int = field(default_factory=budget_units)
    #: scheduled QRs by certified CholeskyQR (``False``: Householder only; tests compare)
    cholesky: bool = True
    #: QRs done by this object (a diagnostic for benchmarks; not persisted).
    reorthogonalisations: int = 0
    #: strip-QRs where the CholeskyQR certificate failed and Householder redid it
    #: (diagnostic, not persisted)
    fallbacks: np.ndarray = field(
        default_factory=lambda: np.zeros(1, dtype=np.int64), repr=False, compare=False
    )
    _work: dict | None = field(default=None, repr=False, compare=False)

    # -- construction -----------------------------------------------------------------
    @classmethod
    def start(
        cls,
        model: NetworkModel,
        *,
        strips: int = 8,
        seed: SeedLike = 0,
        warmup: int | None = None,
        full: bool = False,
        log_cond_budget: float = LOG_COND_BUDGET,
        cholesky: bool = True,
    ) -> StripState:
        """A fresh batch of ``strips`` strips with random initial frames.

        Parameters
        ----------
        model
            The network.
        strips
            Independent strips advanced together (``>= 1``).
        seed
            ``SeedSequence`` or non-negative int; it fixes the whole computation.
        warmup
            Layers discarded before accumulating (default :func:`default_warmup`).
        full
            Track all ``2N`` exponents instead of the positive ``N``.
        log_cond_budget
            Re-orthogonalisation threshold (log of the condition-number bound, the
            orthogonality reserve included); only tests change it.
        cholesky
            Scheduled QRs by certified CholeskyQR with Householder fallback (default)
            or by Householder only (a reference for tests).
        """
        if isinstance(strips, bool) or not isinstance(strips, (int, np.integer)) or strips < 1:
            raise ValueError(f"strips must be an integer >= 1, got {strips!r}")
        if warmup is None:
            warmup = default_warmup(model.width)
        if warmup < 0:
            raise ValueError(f"warmup must be >= 0, got {warmup}")
        if not log_cond_budget > 0:
            raise ValueError(f"log_cond_budget must be positive, got {log_cond_budget}")
        rng = _generator(seed)
        m = model.links if full else model.width
        shape = (int(strips), model.links, m)
        frame = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
        reorthogonalise(frame)
        return cls(
            model=model,
            strips=int(strips),
            warmup=int(warmup),
            frame=frame,
            log_sum=np.zeros((int(strips), m)),
            node_counts=np.zeros((int(strips), 2, 3), dtype=np.int64),
            layers_done=0,
            growth_since_qr=0,
            rng=rng,
            budget=budget_units(log_cond_budget),
            cholesky=bool(cholesky),
        )

    # -- evolution --------------------------------------------------------------------
    @property
    def measured_layers(self) -> int:
        """Layers accumulated after the warm-up."""
        return max(0, self.layers_done - self.warmup)

    def _chunk_layers(self) -> int:
        per_layer = self.strips * max(self.model.draws_per_layer, 2 * self.model.width)
        return int(min(4096, max(8, _CHUNK_VARIATES // per_layer)))

    def _qr(self, measuring: bool, householder: bool = False) -> None:
        chol = self.cholesky and not householder
        logd = reorthogonalise(self.frame, cholesky=chol, fallbacks=self.fallbacks)
        self.reorthogonalisations += 1
        if measuring:
            self.log_sum += logd
        self.growth_since_qr = 0

    def advance(self, layers: int) -> StripState:
        """Advance every strip by ``layers`` layers (warm-up first). Returns ``self``."""
        if isinstance(layers, bool) or not isinstance(layers, (int, np.integer)) or layers < 0:
            raise ValueError(f"layers must be a non-negative integer, got {layers!r}")
        model = self.model
        table = model.node_table()
        growth_int = growth_units(model)
        view = self.frame.view(np.float64)
        bufs = self._buffers()
        remaining = int(layers)
        while remaining > 0:
            k = min(self._chunk_layers(), remaining)
            if self.layers_done < self.warmup:
                k = min(k, self.warmup - self.layers_done)
            measuring = self.layers_done >= self.warmup
            draws = draw_layers(model, self.rng, k, self.strips, out=(bufs["u"], bufs["kinds"]))
            pcos, psin = bufs["cos"][:k], bufs["sin"][:k]
            if model.phase_disorder:
                unit_phases(draws.uniforms, pcos, psin)  # reads the first 4N of each row
            kinds = draws.kinds
            g = bufs["bounds"][: 2 * k]
            column_bounds(kinds, growth_int, g, self.node_counts, measuring)
            self._apply_scheduled(view, kinds, pcos, psin, table, g, measuring)
            self.layers_done += k
            remaining -= k
            if self.layers_done == self.warmup and self.warmup > 0:
                # Warm-up ends: start accumulating from an orthonormal frame
                # (Householder: a CholeskyQR frame's triangular defect would not be
                # telescoped by an accumulated R here).
                self._qr(measuring=False, householder=True)
        return self

    def _buffers(self) -> dict:
        """Work arrays reused across chunks (never persisted).

        Reuse matters: Dask's worker processes run with a low ``MALLOC_TRIM_THRESHOLD_``,
        under which fresh multi-megabyte arrays each chunk cost ~12 % of the run time.
        """
        if self._work is None:
            k, s, n = self._chunk_layers(), self.strips, self.model.width
            self._work = {
                "u": np.empty((k, s, self.model.draws_per_layer)),
                "kinds": np.empty((k, s, 2 * n), dtype=np.int8),
                "cos": np.ones((k, s, 4 * n)),
                "sin": np.zeros((k, s, 4 * n)),
                "bounds": np.empty(2 * k, dtype=np.int64),
                "rows": np.empty((2, 2 * self.frame.shape[2])),
            }
        return self._work

    def _apply_scheduled(self, view, kinds, pcos, psin, table, g, measuring) -> None:
        # The schedule's loop runs compiled (one call per chunk): per column a Python
        # round trip cost ~15 µs, a fifth of the time at N = 16 with a QR every column.
        self.growth_since_qr, qrs = advance_scheduled(
            self.frame,
            kinds,
            pcos,
            psin,
            table,
            g,
            self._buffers()["rows"],
            self.growth_since_qr,
            self.budget,
            self.log_sum,
            measuring,
            self.cholesky,
            self.fallbacks,
        )
        self.reorthogonalisations += qrs

    # -- read-out ---------------------------------------------------------------------
    def result(self) -> LyapunovResult:
        """Exponents so far, without changing the state (a QR of a copy of the frame)."""
        n_meas = self.measured_layers
        if n_meas == 0:
            raise ValueError(
                f"no measured layers yet (warm-up is {self.warmup} layers, "
                f"{self.layers_done} done); advance further before reading exponents"
            )
        logd = reorthogonalise(self.frame.copy(), cholesky=self.cholesky, read_out=True)
        exps = (self.log_sum + logd) / n_meas
        w = self.model.neg_log_t_table()
        sum_rule = np.einsum("shk,hk->s", self.node_counts, w) / n_meas
        return LyapunovResult(
            exponents=exps, layers=n_meas, width=self.model.width, sum_rule=sum_rule
        )

    # -- persistence ------------------------------------------------------------------
    def to_bytes(self) -> bytes:
        """Serialise (NumPy ``.npz`` with a JSON header; no pickle)."""
        m = self.model
        meta = {
            "format": _STATE_FORMAT,
            "sweepctl_version": __version__,
            "numpy_version": np.__version__,
            "model": {
                "width": m.width,
                "x": m.x,
                "p_block": m.p_block,
                "p_open": m.p_open,
                "epsilon": m.epsilon,
                "phase_disorder": m.phase_disorder,
            },
            "strips": self.strips,
            "warmup": self.warmup,
            "layers_done": self.layers_done,
            "growth_since_qr": self.growth_since_qr,
            "budget": self.budget,
            "cholesky": self.cholesky,
            "bit_generator": self.rng.bit_generator.state,
        }
        buf = io.BytesIO()
        np.savez(
            buf,
            meta=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8),
            frame=self.frame,
            log_sum=self.log_sum,
            node_counts=self.node_counts,
        )
        return buf.getvalue()

    @classmethod
    def from_bytes(cls, data: bytes, *, allow_other_build: bool = False) -> StripState:
        """Inverse of :meth:`to_bytes`.

        A state written by another sweepctl or NumPy version is refused unless
        ``allow_other_build``: NumPy guarantees its streams only within one build, and
        the compiled kernel's rounding may differ, so continuing it would mix two
        builds' bits in one result.
        """
        with np.load(io.BytesIO(data), allow_pickle=False) as z:
            meta = json.loads(z["meta"].tobytes().decode())
            if meta.get("format") != _STATE_FORMAT:
                raise ValueError(f"unsupported strip-state format {meta.get('format')!r}")
            theirs = (meta.get("sweepctl_version"), meta.get("numpy_version"))
            if not allow_other_build and theirs != (__version__, np.__version__):
                raise ValueError(
                    f"strip state written by sweepctl {theirs[0]} with numpy {theirs[1]}; "
                    f"this is sweepctl {__version__} with numpy {np.__version__}: start the "
                    "strips afresh, or pass allow_other_build=True to continue anyway"
                )
            bg_state = meta["bit_generator"]
            if bg_state["bit_generator"] != "PCG64":
                raise ValueError(f"unsupported bit generator {bg_state['bit_generator']!r}")
            bitgen = np.random.PCG64()
            bitgen.state = bg_state
            return cls(
                model=NetworkModel(**meta["model"]),
                strips=int(meta["strips"]),
                warmup=int(meta["warmup"]),
                frame=np.array(z["frame"]),
                log_sum=np.array(z["log_sum"]),
                node_counts=np.array(z["node_counts"]),
                layers_done=int(meta["layers_done"]),
                growth_since_qr=int(meta["growth_since_qr"]),
                rng=np.random.Generator(bitgen),
                budget=int(meta["budget"]),
                cholesky=bool(meta["cholesky"]),
            )


def lyapunov_spectrum(
    width: int,
    x: float,
    layers: int,
    *,
    strips: int = 8,
    seed: SeedLike = 0,
    p_block: float = 0.0,
    p_open: float = 0.0,
    epsilon: float = 1e-6,
    warmup: int | None = None,
    phase_disorder: bool = True,
    full: bool = False,
) -> LyapunovResult:
    """Lyapunov exponents of ``strips`` independent network strips.

    Parameters
    ----------
    width
        ``N`` nodes per column (``2N`` links, periodic).
    x
        Coupling; ``x = 0`` is critical for the self-dual network.
    layers
        Measured layers, after ``warmup`` discarded ones.
    strips, seed, warmup, full
        See :meth:`StripState.start`.
    p_block, p_open, epsilon, phase_disorder
        See :class:`~sweepctl.kernel.network.NetworkModel`.

    Returns
    -------
    LyapunovResult
        ``.exponents`` ``(strips, N)`` per layer, descending; ``.Gamma`` the mean of
        ``N·γ`` over strips and ``.Gamma_err`` its standard error; ``.layers``.

    Examples
    --------
    >>> r = lyapunov_spectrum(4, 0.0, 2000, strips=4, seed=1)
    >>> r.exponents.shape
    (4, 4)
    """
    model = NetworkModel(
        width=width,
        x=float(x),
        p_block=float(p_block),
        p_open=float(p_open),
        epsilon=float(epsilon),
        phase_disorder=phase_disorder,
    )
    if isinstance(layers, bool) or not isinstance(layers, (int, np.integer)) or layers < 1:
        raise ValueError(f"layers must be an integer >= 1, got {layers!r}")
    state = StripState.start(model, strips=strips, seed=seed, warmup=warmup, full=full)
    state.advance(state.warmup + int(layers))
    return state.result()


@dataclass(frozen=True)
class PrecisionOutcome:
    """What :func:`advance_to_precision` ended with.

    ``reached`` is ``True`` when the relative standard error of ``Γ`` met the
    target, ``False`` when the layer cap stopped it first.
    """

    result: LyapunovResult
    reached: bool
    rel_err: float

    @property
    def reason(self) -> str:
        """``"precision"`` or ``"layer cap"``."""
        return "precision" if self.reached else "layer cap"


def advance_to_precision(
    state: StripState, target: float, max_layers: int, check_every: int | None = None
) -> PrecisionOutcome:
    """Advance until ``Gamma_err / |Gamma| <= target`` or ``max_layers`` measured layers.

    The check happens every ``check_every`` measured layers (default
    ``max(1000, 20 N)``), at layer counts that depend only on the arguments, so the
    stopping point is reproducible.
    """
    if not target > 0:
        raise ValueError(f"target must be positive, got {target}")
    if state.strips < 2:
        raise ValueError("a precision target needs at least 2 strips (the error is their spread)")
    if check_every is None:
        check_every = max(1000, 20 * state.model.width)
    if state.measured_layers == 0:
        state.advance(state.warmup - state.layers_done + min(check_every, max_layers))
    while True:
        res = state.result()
        rel = res.Gamma_err / abs(res.Gamma) if res.Gamma != 0 else math.inf
        if rel <= target:
            return PrecisionOutcome(res, True, rel)
        if state.measured_layers >= max_layers:
            return PrecisionOutcome(res, False, rel)
        state.advance(min(check_every, max_layers - state.measured_layers))


def product_spectrum(
    sample: Callable[[np.random.Generator, int], np.ndarray],
    n: int,
    steps: int,
    *,
    strips: int = 8,
    seed: SeedLike = 0,
) -> np.ndarray:
    """Lyapunov spectrum of a product of i.i.d. random ``n × n`` matrices.

    Uses the same QR accumulation as the network engine, for checks against the
    closed forms for Gaussian products.

    Parameters
    ----------
    sample
        ``sample(rng, strips)`` returns ``(strips, n, n)`` matrices.
    n, steps, strips, seed
        Matrix size, factors per strip, independent products, seed.

    Returns
    -------
    numpy.ndarray
        ``(strips, n)`` exponents per factor.
    """
    rng = _generator(seed)
    frame = np.broadcast_to(np.eye(n, dtype=complex), (strips, n, n)).copy()
    acc = np.zeros((strips, n))
    for _ in range(steps):
        frame = np.ascontiguousarray(np.matmul(sample(rng, strips), frame), dtype=complex)
        acc += reorthogonalise(frame)
    return acc / steps
