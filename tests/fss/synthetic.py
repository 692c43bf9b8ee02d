"""Invented data for synthetic-recovery tests: a known scaling form plus Gaussian noise.

The "true" parameters below are chosen for the test (ν near [P1] tests/REFERENCES.md so
the problem has realistic conditioning); they are not measurements.
"""

from __future__ import annotations

import numpy as np

from sweepctl.fss import Orders, ScalingData, ScalingModel, resampled_intervals
from sweepctl.fss import fit as _fit
from sweepctl.fss.fit import grid_starts


def fit(data: ScalingData, model: ScalingModel, **kw):
    """A local fit from the fixed grid of starts (as the fit was before the global
    exploration): the statistical checks are about the estimate at the minimum near the
    truth; the exploration (~10x dearer) is tested in tests/fss/test_procedure.py."""
    return _fit(data, model, starts=grid_starts(model, data), **kw)


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


#: cheap general form for checks over hundreds of data sets, orders (2,0,1,0):
#: θ = (ν, x_c); f = f0, f1, f2 (Γ > 0.39 on the grid below); invented values
CHEAP = ScalingModel(Orders(2, 0, 1, 0))
CHEAP_THETA = np.array([2.6, 0.03])
CHEAP_F = np.array([0.8, -0.9, 0.5])
#: its duality-symmetric counterpart ([K7] tests/REFERENCES.md): θ = (ν,); f = f0, f2
SYMMETRIC_CHEAP = ScalingModel(Orders(2, 0, 1, 0), symmetric=True)


def make_strips(
    seed: int,
    n_strips: int,
    model: ScalingModel = CHEAP,
    theta: np.ndarray = CHEAP_THETA,
    f: np.ndarray = CHEAP_F,
    rel_err: float = 0.003,
    widths=WIDTHS,
) -> ScalingData:
    """Each point's Γ is the mean of ``n_strips`` Gaussian strip values; Gamma_err is their
    sample standard error s/√n (so it is itself an estimate, as in a campaign).

    The strips scatter by ``rel_err·Γ·√n``, so the true standard error is ``rel_err·Γ``.
    """
    rng = np.random.default_rng(seed)
    n = np.repeat(np.asarray(widths, float), COUPLINGS.size)
    x = np.tile(COUPLINGS, len(widths))
    g = model.evaluate(theta, f, x, n)
    spread = rel_err * g * np.sqrt(n_strips)
    strips = g[:, None] + spread[:, None] * rng.standard_normal((g.size, n_strips))
    err = strips.std(axis=1, ddof=1) / np.sqrt(n_strips)
    return ScalingData(n, x, strips.mean(axis=1), err, np.full(g.size, n_strips))


def errors_as_exact(data: ScalingData) -> ScalingData:
    """The same points with ``n_strips`` dropped: Gamma_err taken as the true σ."""
    return ScalingData(data.N, data.x, data.Gamma, data.Gamma_err)


def strip_run(seed: int, n_strips: int, resamples: int, compare: bool = False) -> dict:
    """One few-strip data set (:func:`make_strips`): its fit's goodness-of-fit probability
    with the estimated-variance method and with σ̂ taken as exact, and (``resamples`` > 0)
    95 % resampled intervals of ν and x_c; with ``compare`` also the ν interval of σ̂
    taken as exact (Γ + σ̂z, fixed weights).  A top-level function, for process pools."""
    data = make_strips(seed, n_strips)
    best = fit(data, CHEAP)
    exact = errors_as_exact(data)
    best_exact = fit(exact, CHEAP)
    out = {"p": best.p_value, "method": best.gof_method, "p_exact": best_exact.p_value}
    if resamples:
        cis = resampled_intervals(data, best, resamples=resamples, seed=seed)
        out.update(nu_ci=cis.bounds["nu"], x_c_ci=cis.bounds["x_c"], failed=cis.failed)
    if resamples and compare:
        cis = resampled_intervals(exact, best_exact, resamples=resamples, seed=seed)
        out.update(nu_ci_exact=cis.bounds["nu"])
    return out


def general_run(seed: int, resamples: int = 99) -> tuple:
    """Fit of :data:`GENERAL` to ``make(1000 + seed)`` and its resampled intervals (for the
    exact-σ coverage check; a top-level function, for process pools)."""
    data = make(1000 + seed)
    best = fit(data, GENERAL)
    return best, resampled_intervals(data, best, resamples=resamples, seed=seed)


# -- tables of the kind the procedure must not be fooled by (invented; 0.1 % noise) -----
#: self-dual, widths 8–64: a φ⁴ term and a φ²ψ₁ cross term in F, orders (4,1,1,0)
#: symmetric: θ = (ν, y); f = f00, f20, f40, f01, f21, f41
BRANCHY = ScalingModel(Orders(4, 1, 1, 0), symmetric=True)
BRANCHY_THETA = np.array([2.45, -0.45])
BRANCHY_F = np.array([0.8, 0.5, 0.06, 0.4, 0.6, 0.0])
BRANCHY_WIDTHS = (8, 12, 16, 24, 32, 48, 64)
BRANCHY_X = np.linspace(-0.3, 0.3, 9)

#: general form, widths 8–96, orders (3,1,2,1): θ = (ν, y, x_c, a2, b1);
#: f = f00, f10, f20, f30, f01, f11, f21, f31
WIDE = ScalingModel(Orders(3, 1, 2, 1))
WIDE_THETA = np.array([2.6, -0.6, 0.04, 0.5, 0.8])
WIDE_F = np.array([0.8, 0.6, 0.5, 0.05, 0.4, 0.2, 0.6, 0.0])
WIDE_WIDTHS = (8, 12, 16, 24, 32, 48, 64, 96)
WIDE_X = np.linspace(-0.2, 0.3, 11)


def make_table(seed, model, theta, f, widths, couplings, rel_err=1e-3) -> ScalingData:
    """Γ of ``model`` at every (N, x) with relative Gaussian noise (σ given as exact)."""
    rng = np.random.default_rng(seed)
    n = np.repeat(np.asarray(widths, float), couplings.size)
    x = np.tile(couplings, len(widths))
    g = model.evaluate(theta, f, x, n)
    err = rel_err * g
    return ScalingData(n, x, g + err * rng.standard_normal(g.size), err)


def branchy(seed: int = 1) -> ScalingData:
    return make_table(seed, BRANCHY, BRANCHY_THETA, BRANCHY_F, BRANCHY_WIDTHS, BRANCHY_X)


def wide(seed: int = 1) -> ScalingData:
    return make_table(seed, WIDE, WIDE_THETA, WIDE_F, WIDE_WIDTHS, WIDE_X)


def general_strip_run(seed: int, n_strips: int, resamples: int) -> dict:
    """Few-strip data of the general form with an irrelevant field (:data:`GENERAL`):
    95 % resampled intervals of ν, y, x_c (a top-level function, for process pools)."""
    data = make_strips(seed, n_strips, GENERAL, GENERAL_THETA, GENERAL_F)
    best = fit(data, GENERAL)
    cis = resampled_intervals(data, best, resamples=resamples, seed=seed)
    return {
        "p": best.p_value,
        "failed": cis.failed,
        **{k: cis.bounds[k] for k in ("nu", "y", "x_c")},
    }


def procedure_run(seed: int, resamples: int = 200) -> dict:
    """The default procedure (:func:`sweepctl.fss.procedure.run`) on :func:`branchy`
    with another noise seed: the headline interval, whether it is ambiguous, the
    branches' intervals (top-level, for process pools)."""
    from sweepctl.fss.procedure import run

    o = run(branchy(seed), symmetric=True, resamples=resamples, seed=seed)
    if not o.acceptable:
        return {"acceptable": False}
    return {
        "acceptable": True,
        "nu_ci": o.interval("nu"),
        "ambiguous": o.ambiguous,
        "branches": [b.cis.bounds["nu"] for b in o.branches],
        "forms": [r.nu_ci() for r in o.disagreeing_forms()],
    }
