"""Effective exponents from adjacent pairs of widths: where ν is heading, without a form.

Near the transition Γ(x, N) ≈ F((x − x_c) N^{1/ν}) ([M5] tests/REFERENCES.md), so the
k-th derivative in x at x_c grows like N^{k/ν}.  For two widths N₁ < N₂,

    ν_eff = k ln(N₂/N₁) / ln(D₂/D₁),   D the k-th derivative at the pair's crossing,

with k = 1 (slope) where the slopes are resolved and k = 2 (curvature) otherwise — always
on self-dual slices, where Γ is even in x ([K7]) and the slope at x_c = 0 vanishes.  Each
width's derivatives come from a weighted polynomial in x (the lowest degree, up to 4 or 6,
with goodness-of-fit p ≥ 0.1); errors by propagating the polynomial's covariance (draws
from a fixed seed).  Corrections to scaling make ν_eff drift with N; the plot of ν_eff
against √(N₁N₂) shows the drift, and where it levels off, without trusting one form.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from sweepctl.fss.fit import ScalingData, gof_probability

#: draws of the polynomial coefficients behind one error bar
DRAWS = 400
SEED = 82
P_POLY = 0.1


@dataclass(frozen=True)
class EffectiveExponent:
    """ν_eff of one adjacent pair of widths."""

    N1: int
    N2: int
    nu: float
    err: float
    #: "slope" (k = 1) or "curvature" (k = 2)
    kind: str
    #: the coupling where the derivatives were taken (the pair's crossing, or 0)
    x_star: float

    @property
    def N_mid(self) -> float:
        return math.sqrt(self.N1 * self.N2)


def _poly(x, g, e, powers):
    """Weighted least squares of Γ on x**powers: coefficients, covariance, p-value."""
    a = np.stack([x**k for k in powers], axis=1) / e[:, None]
    b = g / e
    coef, *_ = np.linalg.lstsq(a, b, rcond=None)
    cov = np.linalg.pinv(a.T @ a)
    chi2 = float(np.sum((a @ coef - b) ** 2))
    dof = x.size - len(powers)
    return coef, cov, float(stats.chi2.sf(chi2, dof)) if dof > 0 else math.nan


def _width_poly(x, g, e, symmetric):
    """The lowest adequate polynomial of one width (powers, coefficients, covariance)."""
    options = (
        [[0, 2], [0, 2, 4], [0, 2, 4, 6]]
        if symmetric
        else [[0, 1, 2], [0, 1, 2, 3], [0, 1, 2, 3, 4]]
    )
    fitted = None
    for powers in options:
        if x.size < len(powers) + 1:
            break
        fitted = (powers, *_poly(x, g, e, powers))
        if fitted[3] >= P_POLY:
            break
    return fitted


@dataclass(frozen=True)
class Dispersion:
    """The error bars checked without a scaling form: each width's Γ(x) fitted alone."""

    chi2: float
    dof: int
    p_value: float
    #: the highest polynomial degree used for a width
    degree: int
    #: whether ``p_value`` allows for estimated variances (``n_strips`` given)
    estimated: bool


#: per-width polynomials of the dispersion check, widest first
_DISPERSION_POWERS = {
    True: [[0, 2, 4, 6, 8], [0, 2, 4, 6], [0, 2, 4], [0, 2]],
    False: [list(range(d + 1)) for d in (6, 5, 4, 3, 2)],
}


def dispersion(data: ScalingData, symmetric: bool) -> Dispersion | None:
    """Whether the points scatter as their error bars say, with no scaling form.

    Parameters
    ----------
    data
        The slice's points.
    symmetric
        Self-dual slice ([K7] tests/REFERENCES.md): Γ is even in x, and even polynomials
        are used.

    Returns
    -------
    Dispersion or None
        Each width's Γ(x) is fitted alone by the widest polynomial of
        :data:`_DISPERSION_POWERS` that leaves two or more degrees of freedom (even, up to
        degree 8, on a self-dual slice: on a grid symmetric about 0 with up to nine
        couplings that fits the pair means exactly, and the check is then the duality test
        of the pairs; up to degree 6 otherwise). The χ² summed over widths is referred to
        its distribution, with estimated variances where ``n_strips`` is given (the fit's
        own :func:`~sweepctl.fss.fit.gof_probability`, block-diagonal basis). ``None`` if no
        width has enough points.

    Notes
    -----
    This is not a bound on a scaling form's p (a form has fewer parameters and more
    degrees of freedom, and need not be nested in these polynomials); it says whether the
    points agree with their own error bars before any form is asked to.
    """
    blocks, rows, chi2, degree = [], [], 0.0, 0
    for w in data.widths():
        m = np.flatnonzero(data.N == w)
        powers = next((p for p in _DISPERSION_POWERS[symmetric] if m.size >= len(p) + 2), None)
        if powers is None:
            continue
        x, g, e = data.x[m], data.Gamma[m], data.Gamma_err[m]
        a = np.stack([x**k for k in powers], axis=1) / e[:, None]
        coef, *_ = np.linalg.lstsq(a, g / e, rcond=None)
        chi2 += float(np.sum((a @ coef - g / e) ** 2))
        blocks.append(a)
        rows.append(m)
        degree = max(degree, powers[-1])
    if not blocks:
        return None
    idx = np.concatenate(rows)
    k = sum(b.shape[1] for b in blocks)
    design = np.zeros((idx.size, k))
    r = c = 0
    for b in blocks:  # block-diagonal: one polynomial per width
        design[r : r + b.shape[0], c : c + b.shape[1]] = b
        r += b.shape[0]
        c += b.shape[1]
    basis, _ = np.linalg.qr(design)
    strips = None if data.n_strips is None else data.n_strips[idx]
    p = gof_probability(chi2, basis, strips)
    return Dispersion(chi2, int(idx.size - k), p, degree, strips is not None)


def _derivative(powers, coef, x, k):
    return sum(
        c * math.perm(p, k) * x ** (p - k) for p, c in zip(powers, coef, strict=True) if p >= k
    )


def effective_exponents(data: ScalingData, symmetric: bool) -> list[EffectiveExponent]:
    """ν_eff for every adjacent pair of widths (module docstring); pairs that cannot be
    resolved (no crossing inside the data, derivatives of one sign not resolved) are left
    out."""
    widths = data.widths()
    polys = {}
    for w in widths:
        m = data.N == w
        p = _width_poly(data.x[m], data.Gamma[m], data.Gamma_err[m], symmetric)
        if p is not None:
            polys[w] = p
    rng = np.random.default_rng(np.random.SeedSequence(SEED))
    out = []
    lo, hi = float(data.x.min()), float(data.x.max())
    for n1, n2 in itertools.pairwise(widths):
        if n1 not in polys or n2 not in polys:
            continue
        (p1, c1, v1, _), (p2, c2, v2, _) = polys[n1], polys[n2]
        if symmetric:
            x_star = 0.0
        else:
            grid = np.linspace(lo, hi, 401)
            diff = _derivative(p2, c2, grid, 0) - _derivative(p1, c1, grid, 0)
            cross = np.flatnonzero(np.sign(diff[:-1]) != np.sign(diff[1:]))
            if cross.size == 0:
                continue
            centre = 0.5 * (lo + hi)
            i = cross[np.argmin(np.abs(grid[cross] - centre))]
            x_star = float(grid[i] - diff[i] * (grid[i + 1] - grid[i]) / (diff[i + 1] - diff[i]))
        d1 = rng.multivariate_normal(c1, v1, DRAWS)
        d2 = rng.multivariate_normal(c2, v2, DRAWS)
        for k, kind in ((1, "slope"), (2, "curvature")):
            if symmetric and k == 1:
                continue
            s1 = _derivative(p1, d1.T, x_star, k)
            s2 = _derivative(p2, d2.T, x_star, k)
            # resolved: both derivatives of one sign in ≥ 97.5 % of the draws
            if min(np.mean(s1 * s2 > 0), np.mean(np.sign(s1) == np.sign(np.median(s1)))) < 0.975:
                continue
            with np.errstate(all="ignore"):
                nus = k * math.log(n2 / n1) / np.log(s2 / s1)
            nus = nus[np.isfinite(nus)]
            if nus.size < DRAWS // 2:
                continue
            s_mid = _derivative(p1, c1, x_star, k), _derivative(p2, c2, x_star, k)
            nu = k * math.log(n2 / n1) / math.log(s_mid[1] / s_mid[0])
            q16, q84 = np.percentile(nus, [16, 84])
            out.append(EffectiveExponent(n1, n2, float(nu), float(0.5 * (q84 - q16)), kind, x_star))
            break
    return out
