"""The kernel against an independent long-double computation on the same draws.

``tests/kernel/longdouble_reference.py`` repeats the strip computation in ``numpy``
long double with Gram–Schmidt after every column ([K8] of tests/REFERENCES.md). Seeded
like ``StripState.start`` it sees the same initial frame and the same disorder, so the
comparison is per strip: ``d_s = Γ_kernel,s − Γ_reference,s`` is rounding only, and its
spread across strips is orders of magnitude below the statistical spread of ``Γ``.

Two checks are made on ``d``:

* no bias: ``|mean d| < Z · stderr(d)`` (``Z = 4``, stderr from the spread across strips);
* the kernel's own conditioning promise (engine docstring, DEVELOPERS.md "Numerical
  decisions"): between two QRs the frame's condition number stays below
  ``e^{LOG_COND_BUDGET} = 1e-3/u``, so each QR puts a relative rounding error of at
  most ~1e-3 into each ``R_ii``; over ``Q`` QRs and ``L`` measured layers that bounds
  ``|d_s| ≤ N · 1e-3 · Q / L``.

Where the promise holds (``2·arccosh(1/ε) ≤ COLUMN_BUDGET = LOG_COND_BUDGET − 0.031``,
the reserve covering a CholeskyQR frame's defect; i.e. ``ε ≥ 9.57e-7``) both
pass by orders of magnitude; with a doubled budget or at ε = 1e-9 they fail.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest

from sweepctl.kernel import LOG_COND_BUDGET, NetworkModel, StripState, default_warmup
from sweepctl.kernel.network import BLOCKING
from sweepctl.kernel.schedule import COLUMN_BUDGET, ORTHO_RESERVE
from tests.kernel.longdouble_reference import reference_exponents

Z = 4.0  # standard errors allowed in statistical checks
STRIPS, LAYERS = 8, 500
#: The kernel's documented worst-case relative error of an ``R_ii`` per QR, ``u·e^{budget}``.
PER_QR_ERROR = 1e-3
#: [K8] tests/REFERENCES.md: at small ε the reference needs a long double wider than float64.
needs_extended = pytest.mark.skipif(
    np.finfo(np.longdouble).eps >= 1e-18,
    reason="numpy long double is float64 on this platform: no extended-precision reference",
)


def stderr(a: np.ndarray) -> float:
    return float(np.std(a, ddof=1) / math.sqrt(a.size))


def blocking_model(n: int, epsilon: float) -> NetworkModel:
    return NetworkModel(n, 0.0, p_block=1 / 3, p_open=1 / 3, epsilon=epsilon)


@functools.cache
def reference_gamma(model: NetworkModel, seed: int) -> np.ndarray:
    """Per-strip ``Γ`` of the long-double reference (cached: it is the slow part)."""
    ex = reference_exponents(
        model, strips=STRIPS, seed=seed, warmup=default_warmup(model.width), layers=LAYERS
    )
    return model.width * ex[:, model.width - 1]


def kernel_gamma(model: NetworkModel, seed: int, **kw) -> tuple[np.ndarray, int]:
    """Per-strip ``Γ`` of the kernel and the number of QRs behind the measured layers."""
    st = StripState.start(model, strips=STRIPS, seed=seed, **kw)
    st.advance(st.warmup)  # ends with the warm-up QR, which is not accumulated
    q0 = st.reorthogonalisations
    res = st.advance(LAYERS).result()
    return res.Gamma_strips, st.reorthogonalisations - q0 + 1  # + the read-out QR


def check_against_reference(model: NetworkModel, seed: int, **kw) -> tuple[float, float, float]:
    """``(|mean d| / stderr(d), max |d|, design bound)`` for kernel vs reference."""
    gk, qrs = kernel_gamma(model, seed, **kw)
    d = gk - reference_gamma(model, seed)
    bound = model.width * PER_QR_ERROR * qrs / LAYERS
    return abs(d.mean()) / stderr(d), float(np.max(np.abs(d))), bound


# ---------------------------------------------------------------------- the reference itself


@pytest.mark.parametrize(
    "model",
    [NetworkModel(4, 0.3), NetworkModel(3, -0.2, p_block=0.3, p_open=0.2, epsilon=1e-3)],
    ids=["clean", "disordered-1e-3"],
)
def test_reference_and_kernel_agree_to_rounding_where_double_suffices(model):
    """Validates the reference's draws, conventions and accumulation against the kernel.

    Would catch: the reference (or the kernel) reading a different stream, pairing links
    differently, putting phases on the wrong side of a column, or dropping the warm-up.
    """
    ex_k = StripState.start(model, strips=4, seed=71, warmup=10).advance(310).result().exponents
    ex_r = reference_exponents(model, strips=4, seed=71, warmup=10, layers=300)
    # [K8] tests/REFERENCES.md (derived): the same product of the same draws, so only
    # rounding differs, and it does not accumulate (both frames are drawn to the same
    # flag). 1e-10 is the tolerance of the dense-matrix check in test_state.py for these
    # models; a convention error (pairing, phase side, stream order) shows at 1e-2 … 1.
    assert np.allclose(ex_k, ex_r, rtol=0, atol=1e-10)


def test_reference_reproduces_bloch_spectrum():
    """The reference against an exact result, independently of the kernel."""
    n, x, layers = 3, 0.0, 1000
    model = NetworkModel(n, x, phase_disorder=False)
    ex = reference_exponents(model, strips=1, seed=72, warmup=100, layers=layers, full=True)[0]
    k = 2 * np.pi * np.arange(n) / n
    mu = np.arccosh(2 * np.cosh(x) + np.cos(k))
    exact = np.sort(np.concatenate([mu, -mu]))[::-1]
    # [K6] tests/REFERENCES.md (derived): Bloch decomposition, cosh μ = 2 cosh x + cos k,
    # exponents ±μ; a fixed product converges as O(1/L): 20/L as in the kernel's check.
    assert np.allclose(np.sort(ex)[::-1], exact, rtol=0, atol=20.0 / layers)


# ---------------------------------------------------------------------- small ε


def test_default_epsilon_is_inside_the_conditioning_bound():
    eps_default = NetworkModel(4, 0.0).epsilon
    for eps in (1e-2, eps_default, 1e-9):
        g = blocking_model(4, eps).growth_table()[:, BLOCKING]
        # [M2] tests/REFERENCES.md (derived): a blocking block has singular values e^{±θ}
        # with cosh θ = 1/ε, condition number e^{2θ} = ((1 + √(1 − ε²))/ε)² ≈ 4/ε².
        exact = 2.0 * math.log((1.0 + math.sqrt(1.0 - eps * eps)) / eps)
        assert np.allclose(g, exact, rtol=1e-13, atol=0)
    # [derived] DEVELOPERS.md "Numerical decisions": the budget is ln(1e-3/u), u = 2^-52.
    assert math.isclose(LOG_COND_BUDGET, math.log(1e-3 / 2.0**-52), rel_tol=1e-15)
    # [derived] engine docstring: the columns may use the budget less the reserve
    # ½ln((1 + 1/32)/(1 − 1/32)) for a CholeskyQR frame's defect η ≤ 1/32.
    assert math.isclose(ORTHO_RESERVE, 0.5 * math.log(33 / 31), rel_tol=1e-15)
    assert math.isclose(COLUMN_BUDGET, LOG_COND_BUDGET - ORTHO_RESERVE, rel_tol=1e-15)
    # [derived] a lone blocking column is covered iff 2·arccosh(1/ε) ≤ COLUMN_BUDGET, i.e.
    # ε ≥ 1/cosh(COLUMN_BUDGET/2) = 9.57e-7: the default 1e-6 is inside (margin 0.088 in
    # the log), 3e-7 is not.
    eps_min = 1.0 / math.cosh(COLUMN_BUDGET / 2.0)
    assert eps_min < eps_default
    assert blocking_model(4, eps_default).growth_table()[0, BLOCKING] <= COLUMN_BUDGET
    assert blocking_model(4, 3e-7).growth_table()[0, BLOCKING] > COLUMN_BUDGET


@needs_extended
@pytest.mark.parametrize(("n", "epsilon", "seed"), [(4, 1e-6, 81), (3, 1e-6, 82), (4, 1e-4, 83)])
def test_kernel_matches_long_double_reference_at_small_epsilon(n, epsilon, seed):
    """p_block = p_open = 1/3, x = 0: a QR every column, each blocking column near the budget.

    Would catch: a schedule that lets two blocking columns in between QRs (see the next
    test), rounded node coefficients that shift the contracting eigenvalue, or any loss
    of the small directions that the sum rule (volume growth only) cannot see.
    """
    z, worst, bound = check_against_reference(blocking_model(n, epsilon), seed)
    # [K8] tests/REFERENCES.md: per-strip difference on the same draws, no bias at 4σ.
    assert z < Z
    # [K8] + the engine's documented bound (module docstring): |d_s| ≤ N·1e-3·Q/L.
    assert worst < bound


@needs_extended
def test_the_comparison_catches_a_too_lax_schedule():
    """With twice the budget two blocking columns (condition e^{58} ≫ 1/u) go in between
    QRs; the per-strip differences then exceed the kernel's own bound."""
    model = blocking_model(4, 1e-6)
    _, worst_ok, _ = check_against_reference(model, 81)
    _, worst, bound = check_against_reference(model, 81, log_cond_budget=2 * LOG_COND_BUDGET)
    # [K8] + [M2]: two columns of condition ≈ 4/ε² each between QRs bound the error only
    # by u·16/ε⁴ ≫ 1; measured, the differences grow ~10⁴-fold and pass the bound.
    assert worst > bound
    assert worst > 1e3 * worst_ok


@needs_extended
@pytest.mark.xfail(
    strict=True,
    reason="known: below ε ≈ 9.6e-7 a blocking column alone exceeds the double-precision "
    "budget (4u/ε² ≈ 900 at 1e-9); the kernel is biased low by ~2 %",
)
def test_kernel_matches_long_double_reference_at_epsilon_1e_9():
    z, worst, bound = check_against_reference(blocking_model(4, 1e-9), 84)
    # [K8] tests/REFERENCES.md; [M2]: outside the bound this is expected to fail.
    assert z < Z and worst < bound
