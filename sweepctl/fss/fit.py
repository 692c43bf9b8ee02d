"""Weighted least-squares fits of a scaling form, their goodness of fit and error bars.

χ² = Σ ((Γ_i − F_i)/σ̂_i)², minimised over the nonlinear parameters with the linear ``f``
profiled out (variable projection) from several starting points.  Confidence intervals are
percentiles of the estimates refitted to resampled data, the procedure of Slevin and
Ohtsuki [1]_ ([M5] tests/REFERENCES.md).

Goodness of fit
---------------
When the errors σ_i are known, χ² ~ χ²(P − k) (P points, k parameters) and
p = ``chi2.sf(χ², P − k)`` (``gof_method = "chi2-exact-errors"``).  A points table without
``n_strips`` is treated so.

Here σ̂_i = s_i/√n_i comes from n_i independent strip estimates, so (n_i − 1)σ̂_i²/σ_i² ~
χ²(n_i − 1), independent of Γ_i ([S1], [S2] tests/REFERENCES.md), and χ² is no longer
χ²-distributed: each term is Student-t squared, with mean (n − 1)/(n − 3).  With
``n_strips`` given the probability is computed for the fit as it is actually done
(``gof_method = "t-mixture-estimated-errors"``).  Linearise F at the optimum: with
c_i = σ̂_i²/σ_i², D = diag(c_i^{-1/2}), z ~ N(0, I) and Q an orthonormal basis of the
weighted Jacobian σ^{-1}∂F/∂(θ, f), the minimised χ² is

    T = ‖(I − H_D) D z‖²,   H_D the orthogonal projector onto span(D Q).

Given D, T is a Gaussian quadratic form zᵀMz with M = D (I − H_D) D, of mean tr M and
variance 2 tr M²; it is replaced by the scaled χ² a·χ²(b) with those two moments
(Satterthwaite [3]_), a = tr M²/tr M, b = (tr M)²/tr M², and the tail is averaged over
``GOF_DRAWS`` draws of c_i ~ χ²(n_i − 1)/(n_i − 1):

    p = mean_D chi2.sf(χ²_obs / a, b).

The traces need only k×k algebra (G = QᵀD²Q, A₄ = QᵀD⁴Q, A₆ = QᵀD⁶Q: tr M = Σd² − tr G⁻¹A₄,
tr M² = Σd⁴ − 2 tr G⁻¹A₆ + tr (G⁻¹A₄)²), so a probability costs a few milliseconds and runs
inside the scan.  Averaging the conditional tail instead of counting exceedances of T
removes the Monte Carlo noise of z: with 512 draws of D the standard error of p is
≈ 0.003 at p ≈ 0.1 for n = 16, and against a brute-force simulation of T (10⁵ draws,
P = 55, k = 9) the two-moment tail is off by ≲ 0.01 for n = 16 and ≲ 0.005 for n = 51.
The draws come from a fixed seed, so a fit is reproducible.  Q uses σ̂ for σ (a plug-in
that moves only the k-dimensional projection).  For σ exact, D = I, M is a projector of
rank P − k, and the formula is ``chi2.sf(χ², P − k)`` exactly; that case is computed so.

Resampled intervals
-------------------
With σ exact, Γ*_i = Γ_i + σ_i z_i and the refit keeps the weights 1/σ_i ([M5]).  With σ̂
from n_i strips the resamples imitate both sources of error of the real fit, about the
fitted curve F̂ (a parametric resample):

    Γ*_i = F̂_i + σ̂_i t_i,  t_i ~ Student t(n_i − 1)   ([S2]: Γ_i − μ_i = σ̂_i t exactly),
    σ̂*_i = σ̂_i (χ²(n_i − 1)/(n_i − 1))^{1/2}          ([S1]: the refit's weights are noisy).

Why: for a weighted mean of K points with equal σ and weights 1/σ̂², the true variance is
(σ²/K)(1 + CV²), CV² = 2/(ν − 4) the squared coefficient of variation of the weights
(ν = n − 1).  Gaussian resampling with fixed weights 1/σ̂² gives (σ²/K)(ν − 2)/ν (since
E[1/σ̂²] = ν/((ν − 2)σ²)), too short on both counts.  Drawing σ̂* restores (1 + CV²); the
t draws, of variance σ̂²ν/(ν − 2), cancel (ν − 2)/ν, leaving (σ²/K)(1 + CV²) to leading
order in 1/ν.  Centring on F̂ rather than on Γ matters once the weights are redrawn: the
observed residuals Γ − F̂ are orthogonal to the Jacobian only under the original weights,
and reweighting them would add a spurious spread of relative size ≈ CV².  Measured on
invented data (orders 2,0,1,0, 55 points, 95 % intervals of ν, 300–400 data sets per
entry, binomial standard error ≈ 1.2 %): with n = 16 strips the coverage is 93–95 % for
Γ + σ̂z (three runs), 97 % for Γ + σ̂z with σ̂*, 98 % for Γ + σ̂t with σ̂*, and 95.7 % as
done here (resampled standard deviation of ν 0.00699, sampling one 0.00699); with n = 8
it is 87 % for Γ + σ̂z and 96 % as done here.

Percentile end points use the (R + 1)q plotting position (numpy's ``"weibull"`` method): if
the resampled deviations have the law of the estimate's deviation, the truth is then
exchangeable with R resamples and falls below the q-th end point with probability q for
any R (Davison and Hinkley [2]_).  Linear interpolation over R − 1 instead puts the end
point at order statistic 0.025(R − 1) + 1, missed with probability (0.025(R − 1) + 1)/(R + 1)
per side: ≈ 94 % coverage for a nominal 95 % at R = 200, ≈ 93 % at R = 100.

References
----------
.. [1] K. Slevin and T. Ohtsuki, Phys. Rev. Lett. 82, 382 (1999) ([M5] tests/REFERENCES.md).
.. [2] A. C. Davison and D. V. Hinkley, *Bootstrap Methods and their Application*
   (Cambridge University Press, 1997), §2.4 and §5.2 ([S3] tests/REFERENCES.md).
.. [3] F. E. Satterthwaite, "An approximate distribution of estimates of variance
   components", Biometrics Bulletin 2, 110 (1946) ([S4] tests/REFERENCES.md).
"""

from __future__ import annotations

import functools
import itertools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from sweepctl.fss.model import ScalingModel

#: quantities with confidence intervals, in report order
QUANTITIES = ("nu", "y", "x_c", "Gamma_c")

#: ``Fit.gof_method`` values: σ taken as exact, or σ̂ estimated from ``n_strips`` strips
GOF_EXACT = "chi2-exact-errors"
GOF_ESTIMATED = "t-mixture-estimated-errors"
#: draws of the variance estimates behind one goodness-of-fit probability
GOF_DRAWS = 512
#: fixed seed of those draws (a fit must be reproducible)
GOF_SEED = 1999
_GOF_BLOCK = 32


class FitError(ValueError):
    """Data or model unusable for a fit (the message says which and what to do)."""


@dataclass(frozen=True)
class ScalingData:
    """Points of one disorder/epsilon slice: widths N, couplings x, Γ and its error.

    ``n_strips`` is the number of independent strip estimates behind each ``Gamma_err``
    (σ̂ = s/√n).  ``None`` — or ``inf`` for a point — means the error is taken as exact.
    """

    N: np.ndarray
    x: np.ndarray
    Gamma: np.ndarray
    Gamma_err: np.ndarray
    n_strips: np.ndarray | None = None

    def __post_init__(self) -> None:
        for name in ("N", "x", "Gamma", "Gamma_err"):
            object.__setattr__(self, name, np.asarray(getattr(self, name), dtype=float))
        sizes = {a.size for a in (self.N, self.x, self.Gamma, self.Gamma_err)}
        if len(sizes) != 1:
            raise FitError("N, x, Gamma and Gamma_err must have the same length")
        for name in ("N", "x", "Gamma", "Gamma_err"):
            bad = ~np.isfinite(getattr(self, name))
            if bad.any():
                i = int(np.argmax(bad))
                raise FitError(
                    f"{name} is not a finite number at N = {self.N[i]:g}, x = {self.x[i]:g}: "
                    "remove the row or finish the point (sweepctl run)"
                )
        if (self.Gamma_err <= 0).any():
            i = int(np.argmax(self.Gamma_err <= 0))
            raise FitError(
                f"Gamma_err = {self.Gamma_err[i]:g} at N = {self.N[i]:g}, x = {self.x[i]:g}: "
                "errors must be > 0 (a point needs at least two strips)"
            )
        if (self.N <= 1).any():
            i = int(np.argmax(self.N <= 1))
            raise FitError(f"N = {self.N[i]:g}: widths in a scaling fit must be > 1")
        if self.n_strips is not None:
            if np.asarray(self.n_strips).size not in (1, self.N.size):
                raise FitError("n_strips must have one entry per point")
            n = np.broadcast_to(np.asarray(self.n_strips, dtype=float), self.N.shape).copy()
            # NaN fails ``n >= 2``; inf (σ exact) equals its own rounding
            bad = ~((n >= 2) & (n == np.round(n)))
            if bad.any():
                i = int(np.argmax(bad))
                raise FitError(
                    f"n_strips = {n[i]:g} at N = {self.N[i]:g}, x = {self.x[i]:g}: give the "
                    "whole number (≥ 2) of strip estimates behind Gamma_err, or drop the "
                    "column to treat the errors as exact"
                )
            object.__setattr__(self, "n_strips", None if np.isposinf(n).all() else n)

    @property
    def size(self) -> int:
        return int(self.N.size)

    @property
    def errors_estimated(self) -> bool:
        """Whether some ``Gamma_err`` is a sample estimate (``n_strips`` finite)."""
        return self.n_strips is not None

    def widths(self) -> list[int]:
        return sorted({int(n) for n in self.N})

    def window(self, n_min: int) -> ScalingData:
        keep = self.N >= n_min
        n = None if self.n_strips is None else self.n_strips[keep]
        return ScalingData(self.N[keep], self.x[keep], self.Gamma[keep], self.Gamma_err[keep], n)

    def with_gamma(self, gamma: np.ndarray, gamma_err: np.ndarray | None = None) -> ScalingData:
        """The same points with Γ (and optionally its error) replaced; ``n_strips`` kept."""
        err = self.Gamma_err if gamma_err is None else gamma_err
        return ScalingData(self.N, self.x, gamma, err, self.n_strips)


def _variance_ratios(rng: np.random.Generator, n_strips: np.ndarray, rows: int) -> np.ndarray:
    """``rows`` draws per point of σ̂²/σ² ~ χ²(n − 1)/(n − 1) ([S1] tests/REFERENCES.md).

    Points with ``n_strips = inf`` (σ exact) get 1.
    """
    nu = np.asarray(n_strips, float) - 1.0
    out = np.ones((rows, nu.size))
    fin = np.isfinite(nu)
    if fin.any():
        out[:, fin] = rng.chisquare(nu[fin], size=(rows, int(fin.sum()))) / nu[fin]
    return out


def gof_probability(
    chi2: float,
    basis: np.ndarray,
    n_strips: np.ndarray | None,
    *,
    draws: int = GOF_DRAWS,
    seed: int = GOF_SEED,
) -> float:
    """Goodness-of-fit probability P(T ≥ χ²) of a linearised weighted least-squares fit.

    Parameters
    ----------
    chi2 : float
        Observed minimum Σ ((Γ − F)/σ̂)².
    basis : ndarray, shape (P, k)
        Orthonormal basis of the weighted Jacobian of F at the optimum (all k parameters).
    n_strips : ndarray of shape (P,), or None
        Strip estimates behind each σ̂ (``inf``: σ exact).  ``None`` or all ``inf`` gives
        ``chi2.sf(chi2, P − k)``.
    draws, seed : int
        Number of draws of the variance estimates, and their seed.

    Returns
    -------
    float
        The probability.  With estimated σ, T = ‖(I − H_D) D z‖² (module docstring);
        given D it is approximated by a scaled χ² of the same mean and variance
        (Satterthwaite, Biometrics Bulletin 2, 110 (1946)), and that tail is averaged over
        ``draws`` draws of σ̂²/σ² ~ χ²(n − 1)/(n − 1) ([S1], [S2] tests/REFERENCES.md).
    """
    q = np.asarray(basis, float)
    p_pts, k = q.shape
    if p_pts <= k:
        raise FitError(f"{p_pts} points and {k} parameters leave no degree of freedom")
    if n_strips is None or np.isposinf(np.asarray(n_strips, float)).all():
        return float(stats.chi2.sf(chi2, p_pts - k))
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    d2 = 1.0 / _variance_ratios(rng, n_strips, draws)  # D² = σ²/σ̂², one row per draw
    qq = (q[:, :, None] * q[:, None, :]).reshape(p_pts, k * k)
    tr_m = np.empty(draws)
    tr_m2 = np.empty(draws)
    # blocks small enough that BLAS stays single-threaded (threads only cost here)
    for lo in range(0, draws, _GOF_BLOCK):
        w = d2[lo : lo + _GOF_BLOCK]
        b = w.shape[0]
        g, a4, a6 = ((w**m @ qq).reshape(b, k, k) for m in (1, 2, 3))
        sol = np.linalg.solve(g, np.concatenate([a4, a6], axis=2))
        x4, x6 = sol[:, :, :k], sol[:, :, k:]
        tr_m[lo : lo + b] = w.sum(axis=1) - np.trace(x4, axis1=1, axis2=2)
        tr_m2[lo : lo + b] = (
            (w**2).sum(axis=1)
            - 2.0 * np.trace(x6, axis1=1, axis2=2)
            + np.einsum("bij,bji->b", x4, x4)
        )
    scale = tr_m2 / tr_m
    dof = tr_m**2 / tr_m2
    return float(np.mean(stats.chi2.sf(chi2 / scale, dof)))


@dataclass
class Fit:
    """Best fit of one model to one data set."""

    model: ScalingModel
    theta: np.ndarray
    f: np.ndarray
    chi2: float
    dof: int
    n_min: int
    points_used: int
    #: linearised standard errors of the nonlinear parameters (from the projected Jacobian)
    theta_err: np.ndarray = field(default_factory=lambda: np.zeros(0))
    #: nonlinear parameters that ended on a bound of the search (not determined by the data)
    at_bound: tuple[str, ...] = ()
    #: the points fitted (N ≥ n_min), for the goodness of fit
    data: ScalingData | None = field(default=None, repr=False)

    @property
    def gof_method(self) -> str:
        """How :attr:`p_value` is computed: ``GOF_EXACT`` or ``GOF_ESTIMATED``."""
        if self.data is not None and self.data.errors_estimated:
            return GOF_ESTIMATED
        return GOF_EXACT

    @functools.cached_property
    def p_value(self) -> float:
        """Goodness-of-fit probability (module docstring; [M5], [S2] tests/REFERENCES.md)."""
        if self.gof_method == GOF_EXACT:
            return float(stats.chi2.sf(self.chi2, self.dof))
        basis = weighted_basis(self.model, self.theta, self.f, self.data)
        return gof_probability(self.chi2, basis, self.data.n_strips)

    def values(self) -> dict[str, float]:
        """ν, y, x_c, Γ_c (NaN when the model has no such parameter)."""
        p = self.model.unpack(self.theta)
        return {
            "nu": p["nu"],
            "y": p.get("y", math.nan if self.model.fixed_y is None else self.model.fixed_y),
            "x_c": p.get("x_c", 0.0),
            "Gamma_c": float(self.f[0]),
        }

    def linear_error(self, name: str) -> float:
        names = self.model.nonlinear_names()
        return float(self.theta_err[names.index(name)]) if name in names else math.nan


def jacobian(
    model: ScalingModel, theta: np.ndarray, f: np.ndarray, x: np.ndarray, n: np.ndarray
) -> np.ndarray:
    """Jacobian (P × k) of F at the points (x, N) in all k parameters: θ, then f.

    The θ columns are central differences (step 1e-6·(1 + |θ_j|)); the f columns are the
    design matrix, F being linear in f.  A column that cannot be evaluated is left zero.
    """
    theta = np.asarray(theta, float)
    x, n = np.asarray(x, float), np.asarray(n, float)
    cols = []
    for j in range(theta.size):
        h = 1e-6 * (1.0 + abs(theta[j]))
        up, dn = theta.copy(), theta.copy()
        up[j] += h
        dn[j] -= h
        with np.errstate(all="ignore"):
            col = (model.evaluate(up, f, x, n) - model.evaluate(dn, f, x, n)) / (2 * h)
        cols.append(np.where(np.isfinite(col), col, 0.0))
    return np.column_stack([*cols, model.design(theta, x, n)])


def weighted_basis(
    model: ScalingModel, theta: np.ndarray, f: np.ndarray, data: ScalingData
) -> np.ndarray:
    """Orthonormal basis (P × k) of the Jacobian of F/σ̂ in all k parameters (θ and f),
    :func:`jacobian` divided row by row by σ̂."""
    jac = jacobian(model, theta, f, data.x, data.N) / data.Gamma_err[:, None]
    q, _ = np.linalg.qr(jac)
    return q


def _check(data: ScalingData, model: ScalingModel) -> None:
    if data.size <= model.n_params:
        raise FitError(
            f"points_used = {data.size} but {model.describe()} has {model.n_params} "
            "parameters: lower the orders (--orders), lower --n-min or add points"
        )
    need = 3 if model.has_irrelevant else 2
    if len(data.widths()) < need:
        raise FitError(
            f"widths {data.widths()}: {model.describe()} needs at least {need} widths "
            "(use --orders with n_I = 0 for two, or add widths)"
        )


def _project(a: np.ndarray, gamma: np.ndarray, w: np.ndarray):
    """Weighted design matrix, weighted Γ and the least-squares f (variable projection)."""
    aw = a * w[:, None]
    b = gamma * w
    f, *_ = np.linalg.lstsq(aw, b, rcond=None)
    return aw, b, f


def _residuals(theta, model, data, w):
    a = model.design(theta, data.x, data.N)
    if not np.all(np.isfinite(a)):
        return np.full(data.size, 1e6)
    aw, b, f = _project(a, data.Gamma, w)
    return aw @ f - b


def _bounds(model: ScalingModel, data: ScalingData) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = [], []
    span = float(np.ptp(data.x)) or 1.0
    for name in model.nonlinear_names():
        if name == "nu":
            lo.append(0.2)
            hi.append(50.0)
        elif name == "y":
            lo.append(-20.0)
            hi.append(-1e-3)
        elif name == "x_c":
            lo.append(float(data.x.min()) - span)
            hi.append(float(data.x.max()) + span)
        else:
            lo.append(-np.inf)
            hi.append(np.inf)
    return np.array(lo), np.array(hi)


#: global exploration of the nonlinear parameters (:func:`design_of_starts`): ν is drawn
#: log-uniformly over this range, y uniformly over the next; x_c over the data's couplings
NU_DESIGN = (0.5, 6.0)
Y_DESIGN = (-4.0, -0.05)
#: points of the design whose χ² is evaluated (one profiled residual each, ~0.1 ms)
DESIGN_SIZE = 128
#: the design is cut into this many log-spaced ν bins; the best ``PER_BIN`` points of each
#: bin are optimised locally, so every region of ν is tried whatever its χ² at the start
NU_BINS = 6
PER_BIN = 2
DESIGN_SEED = 382


def design_of_starts(model: ScalingModel, data: ScalingData, size: int = DESIGN_SIZE):
    """A space-filling design (scrambled Sobol, fixed seed) of the nonlinear parameters.

    ν log-uniform over ``NU_DESIGN``, y uniform over ``Y_DESIGN``, x_c uniform over the
    data's couplings, and the field coefficients of both signs: a_k (u_0 = w + a_k w^k)
    within ±1/s^{k−1} and b_k (u_1 = 1 + b_k w^k) within ±1/s^k, s the half-span of the
    couplings, i.e. terms up to the size of the leading one at the edge of the data.

    Returns
    -------
    ndarray, shape (size, k)
        One start per row, columns in ``model.nonlinear_names()`` order.
    """
    names = model.nonlinear_names()
    half = 0.5 * (float(np.ptp(data.x)) or 1.0)
    lo, hi, log = [], [], []
    for name in names:
        if name == "nu":
            a, b = math.log(NU_DESIGN[0]), math.log(NU_DESIGN[1])
        elif name == "y":
            a, b = Y_DESIGN
        elif name == "x_c":
            a, b = float(data.x.min()), float(data.x.max())
        elif name.startswith("a"):
            c = half ** -(int(name[1:]) - 1)
            a, b = -c, c
        else:  # b_k
            c = half ** -int(name[1:])
            a, b = -c, c
        lo.append(a)
        hi.append(b)
        log.append(name == "nu")
    sobol = stats.qmc.Sobol(len(names), scramble=True, seed=DESIGN_SEED)
    u = sobol.random(size)
    pts = np.asarray(lo) + u * (np.asarray(hi) - np.asarray(lo))
    pts[:, np.asarray(log)] = np.exp(pts[:, np.asarray(log)])
    return pts


def screened_starts(
    model: ScalingModel, data: ScalingData, per_bin: int = PER_BIN
) -> list[np.ndarray]:
    """Local starts: the best ``per_bin`` design points (lowest profiled χ²) per ν bin.

    A design point's χ² has the linear f profiled out, so it already says how well the
    best F fits at those fields; keeping the best of every ν bin (rather than the best
    overall) makes every part of ν's range compete, which is what finds a second branch.
    """
    pts = design_of_starts(model, data)
    w = 1.0 / data.Gamma_err
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        chi2 = np.array([float(np.sum(_residuals(p, model, data, w) ** 2)) for p in pts])
    edges = np.geomspace(*NU_DESIGN, NU_BINS + 1)
    bins = np.clip(np.searchsorted(edges, pts[:, 0]) - 1, 0, NU_BINS - 1)
    out = []
    for b in range(NU_BINS):
        idx = np.flatnonzero(bins == b)
        out += [pts[i] for i in idx[np.argsort(chi2[idx])][:per_bin]]
    return out


#: function evaluations a start of the global exploration may use; a start still moving
#: then (a flat valley, far from any minimum that matters) is polished only if its χ² is
#: within reach of acceptance
EXPLORE_NFEV = 100
EXPLORE_POLISH_NFEV = 600
POLISH_NFEV = 2000


def _solve(model, data, start, lo, hi, max_nfev=POLISH_NFEV):
    w = 1.0 / data.Gamma_err
    pad = 1e-9 * (np.abs(np.where(np.isfinite(lo), lo, 0)) + 1)
    start = np.clip(start, lo + pad, hi - pad)  # strictly inside, as trf requires
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        res = optimize.least_squares(
            _residuals,
            start,
            args=(model, data, w),
            bounds=(lo, hi),
            method="trf",
            x_scale="jac",
            xtol=1e-12,
            ftol=1e-12,
            gtol=1e-12,
            max_nfev=max_nfev,
        )
    return res


def _as_fit(model, d, n_min, res, lo, hi) -> Fit:
    w = 1.0 / d.Gamma_err
    f = _project(model.design(res.x, d.x, d.N), d.Gamma, w)[2]
    err = np.full(res.x.size, math.nan)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            cov = np.linalg.pinv(res.jac.T @ res.jac)
            err = np.sqrt(np.clip(np.diag(cov), 0, None))
        except np.linalg.LinAlgError:
            pass
    tol = 1e-6 * (1 + np.abs(res.x))
    on = (np.abs(res.x - lo) <= tol) | (np.abs(hi - res.x) <= tol)
    return Fit(
        at_bound=tuple(n for n, b in zip(model.nonlinear_names(), on, strict=True) if b),
        model=model,
        theta=res.x,
        f=f,
        chi2=float(res.fun @ res.fun),
        dof=d.size - model.n_params,
        n_min=n_min,
        points_used=d.size,
        theta_err=err,
        data=d,
    )


def _same_minimum(a: Fit, b: Fit) -> bool:
    """Two converged solutions are one minimum when ν, y and x_c agree within the larger of
    their linearised standard errors (or 1e-3 relative).  The field coefficients a_k, b_k
    are not compared: solutions that differ only there describe the same exponents."""
    names = a.model.nonlinear_names()
    for j, name in enumerate(names):
        if name not in ("nu", "y", "x_c"):
            continue
        s = np.nanmax([a.theta_err[j], b.theta_err[j], 0.0])
        tol = max(s if np.isfinite(s) else 0.0, 1e-3 * (1.0 + abs(a.theta[j])))
        if abs(a.theta[j] - b.theta[j]) > tol:
            return False
    return True


def explore(
    data: ScalingData,
    model: ScalingModel,
    *,
    n_min: int | None = None,
    starts: list[np.ndarray] | None = None,
    per_bin: int = PER_BIN,
) -> list[Fit]:
    """The distinct local minima of χ² for ``model`` on the points with N ≥ ``n_min``.

    Parameters
    ----------
    data : ScalingData
        Γ with its standard errors.
    model : ScalingModel
        The scaling form (orders, symmetry, correction, fixed y).
    n_min : int, optional
        Smallest width used (default: all).
    starts : list of ndarray, optional
        Local starts instead of the global exploration (a refit from known optima).
    per_bin : int
        Design points optimised per ν bin (:func:`screened_starts`); the scan uses 1.

    Returns
    -------
    list of Fit
        One per distinct minimum, lowest χ² first.  By default the starts are the
        screened space-filling design (:func:`screened_starts`) plus a small fixed grid
        (ν ∈ {1.5, 2.5, 4}, y ∈ {−0.5, −2}, x_c at the weighted centre); converged
        solutions that agree within their linearised errors are merged
        (:func:`_same_minimum`), so branches of the form — distinct minima, each perhaps
        acceptable — are all returned.  ``p_value`` follows the module docstring
        ([M5], [S2] tests/REFERENCES.md).
    """
    n_min = int(n_min if n_min is not None else min(data.widths()))
    d = data.window(n_min)
    _check(d, model)
    lo, hi = _bounds(model, d)
    budget = EXPLORE_NFEV if starts is None else POLISH_NFEV
    if starts is None:
        starts = [*grid_starts(model, d), *screened_starts(model, d, per_bin)]
    # a χ² this far above the dof is hopeless (p < 1e-4 even with 16-strip errors, [S2])
    reach = d.size - model.n_params + 10.0 * math.sqrt(2.0 * (d.size - model.n_params)) + 20.0
    found: list[Fit] = []
    for s in starts:
        res = _solve(model, d, np.asarray(s, float), lo, hi, budget)
        if not np.all(np.isfinite(res.fun)) or float(res.fun @ res.fun) >= 1e11:
            continue
        if res.status == 0 and float(res.fun @ res.fun) <= reach:
            res = _solve(model, d, res.x, lo, hi, EXPLORE_POLISH_NFEV)
        found.append(_as_fit(model, d, n_min, res, lo, hi))
    if not found:
        raise FitError(f"{model.describe()}: no start converged; try other orders")
    found.sort(key=lambda f: f.chi2)
    minima: list[Fit] = []
    for f in found:
        if not any(_same_minimum(m, f) for m in minima):
            minima.append(f)
    return minima


def grid_starts(model: ScalingModel, data: ScalingData) -> list[np.ndarray]:
    """The fixed grid of starts: ν ∈ {1.5, 2.5, 4}, y ∈ {−0.5, −2}, x_c at the weighted
    centre, other parameters 0 (a local search; :func:`explore` adds the global design)."""
    names = model.nonlinear_names()
    centre = float(np.average(data.x, weights=1 / data.Gamma_err**2))
    grids = {"nu": [1.5, 2.5, 4.0], "y": [-0.5, -2.0], "x_c": [centre]}
    axes = [grids.get(n, [0.0]) for n in names]
    return [np.array(p, dtype=float) for p in itertools.product(*axes)]


def fit(
    data: ScalingData,
    model: ScalingModel,
    *,
    n_min: int | None = None,
    starts: list[np.ndarray] | None = None,
) -> Fit:
    """Lowest-χ² fit of ``model`` to the points with N ≥ ``n_min`` (:func:`explore`).

    Parameters
    ----------
    data : ScalingData
        Γ with its standard errors.
    model : ScalingModel
        The scaling form (orders, symmetry, correction).
    n_min : int, optional
        Smallest width used.
    starts : list of ndarray, optional
        Local starts (default: the global exploration of :func:`explore`).

    Returns
    -------
    Fit
        The lowest-χ² minimum; its ``p_value`` is ``chi2.sf`` for exact errors and the
        estimated-variance probability when ``data.n_strips`` is given (module docstring;
        [M5], [S2] tests/REFERENCES.md).
    """
    return explore(data, model, n_min=n_min, starts=starts)[0]


def resample_chunk(
    data: ScalingData,
    model: ScalingModel,
    n_min: int,
    theta0: np.ndarray,
    seed: int,
    chunk: int,
    count: int,
) -> np.ndarray:
    """Estimates (ν, y, x_c, Γ_c) refitted to ``count`` resamples of ``data``.

    With σ exact: Γ* = Γ + σ z ([M5] tests/REFERENCES.md).  With σ̂ from ``n_strips``:
    Γ* = F̂ + σ̂ t(n − 1) about the fitted curve F̂, and σ̂* = σ̂ (χ²(n − 1)/(n − 1))^{1/2}
    ([S1], [S2]; module docstring).  Resample ``r`` of chunk ``c`` draws from ``SeedSequence(seed,
    spawn_key=(c,))``, so the result does not depend on how chunks are spread over workers.
    A refit that fails gives a row of NaN (counted by the caller).

    ``theta0`` of shape (k,) gives an array (count, 4).  Of shape (B, k) — the optima of B
    branches, the first the lowest χ² — every resample is refitted from each branch's
    optimum, and the result (count, B + 1, 4) holds in slot 0 the refit of lowest χ² (the
    resample's global answer, which may change branch) and in slot b + 1 the refit from
    branch b (that branch's own spread).  F̂ is the first branch's curve.
    """
    theta0 = np.asarray(theta0, float)
    single = theta0.ndim == 1
    thetas = theta0[None, :] if single else theta0
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(chunk,)))
    d = data.window(n_min)
    out = np.full((count, thetas.shape[0] + 1, len(QUANTITIES)), math.nan)
    if d.n_strips is not None:
        # the fitted curve at the best optimum (f profiled out exactly as in the fit)
        a = model.design(thetas[0], d.x, d.N)
        curve = a @ _project(a, d.Gamma, 1.0 / d.Gamma_err)[2]
    for r in range(count):
        z = rng.standard_normal(d.size)
        if d.n_strips is None:
            dr = d.with_gamma(d.Gamma + d.Gamma_err * z)
        else:
            # t = z / √(χ²_ν/ν) is Student t(ν); the second draw gives the refit's weights
            u, c = _variance_ratios(rng, d.n_strips, 2)
            dr = d.with_gamma(curve + d.Gamma_err * z / np.sqrt(u), d.Gamma_err * np.sqrt(c))
        best = math.inf
        for b, th in enumerate(thetas):
            try:
                fr = fit(dr, model, n_min=n_min, starts=[th])
            except FitError:
                continue
            v = fr.values()
            out[r, b + 1] = [v[q] for q in QUANTITIES]
            if fr.chi2 < best:
                best = fr.chi2
                out[r, 0] = out[r, b + 1]
    return out[:, 1] if single else out


@dataclass
class Intervals:
    """Percentile confidence intervals from the resampled estimates."""

    level: float
    bounds: dict[str, tuple[float, float]]
    resamples: int
    failed: int


def intervals(estimates: np.ndarray, level: float = 0.95) -> Intervals:
    """Two-sided percentile intervals of each column of ``estimates`` (NaN rows dropped).

    End points at the (R + 1)q plotting position (module docstring; Davison and Hinkley,
    *Bootstrap Methods and their Application* (1997), §5.2).
    """
    ok = estimates[np.all(np.isfinite(estimates[:, [0, 3]]), axis=1)]
    q = [(1 - level) / 2 * 100, (1 + level) / 2 * 100]
    bounds = {}
    for c, name in enumerate(QUANTITIES):
        col = ok[:, c]
        col = col[np.isfinite(col)]
        ends = np.percentile(col, q, method="weibull") if col.size else [math.nan, math.nan]
        bounds[name] = tuple(float(v) for v in ends)
    return Intervals(level, bounds, int(estimates.shape[0]), int(estimates.shape[0] - len(ok)))


def chunks(resamples: int, size: int = 20) -> list[tuple[int, int]]:
    """(chunk index, count) covering ``resamples`` in pieces of ``size``."""
    return [(c, min(size, resamples - c * size)) for c in range(math.ceil(resamples / size))]


def resampled_intervals(
    data: ScalingData,
    best: Fit,
    *,
    resamples: int = 200,
    seed: int = 0,
    level: float = 0.95,
    mapper=None,
) -> Intervals:
    """CIs of ν, y, x_c, Γ_c by refitting ``resamples`` resamples of ``data``.

    Parameters
    ----------
    data : ScalingData
        The points (all widths; the fit's window is taken from ``best``).
    best : Fit
        The best fit; refits start at its parameters.
    resamples : int
        Number of resampled data sets (Γ + σ z, or with ``n_strips`` Γ + σ̂ t with
        resampled σ̂: :func:`resample_chunk`; [M5], [S1], [S2] tests/REFERENCES.md).
    seed : int
        Seed of the resamples (chunk ``c`` uses ``SeedSequence(seed, spawn_key=(c,))``).
    level : float
        Two-sided level of the percentile intervals.
    mapper : callable, optional
        ``mapper(func, list_of_args)`` runs the chunks (default: in this process, in
        order); the driver passes one that spreads them over a Dask cluster.

    Returns
    -------
    Intervals
        Percentile intervals at the (R + 1)q plotting position, and the failure count.
    """
    jobs = [(data, best.model, best.n_min, best.theta, seed, c, k) for c, k in chunks(resamples)]
    if mapper is None:
        parts = [resample_chunk(*j) for j in jobs]
    else:
        parts = list(mapper(resample_chunk, jobs))
    return intervals(np.concatenate(parts, axis=0), level)


def branch_intervals(
    data: ScalingData,
    branches: list[Fit],
    *,
    resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
    mapper=None,
) -> tuple[Intervals, list[Intervals]]:
    """Resampled intervals when a form has several acceptable minima (branches).

    Every resample is refitted from every branch's optimum (:func:`resample_chunk` with a
    (B, k) ``theta0``).  Returns the intervals of the lowest-χ² refit per resample (the
    procedure's answer, free to change branch) and each branch's own intervals.
    """
    best = branches[0]
    thetas = np.stack([b.theta for b in branches])
    jobs = [(data, best.model, best.n_min, thetas, seed, c, k) for c, k in chunks(resamples)]
    if mapper is None:
        parts = [resample_chunk(*j) for j in jobs]
    else:
        parts = list(mapper(resample_chunk, jobs))
    est = np.concatenate(parts, axis=0)
    return intervals(est[:, 0], level), [
        intervals(est[:, b + 1], level) for b in range(len(branches))
    ]
