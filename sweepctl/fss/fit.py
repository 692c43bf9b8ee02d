"""Weighted least-squares fits of a scaling form, and their resampling error bars.

χ² = Σ ((Γ_i − F_i)/σ_i)², minimised over the nonlinear parameters with the linear ``f``
profiled out (variable projection) from several starting points.  The goodness of fit is
the χ² tail probability with ``points − parameters`` degrees of freedom.  Confidence
intervals are percentiles of the estimates refitted to Gaussian-resampled data
Γ_i + σ_i z_i, the procedure of Slevin and Ohtsuki (Phys. Rev. Lett. 82, 382 (1999)).
"""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from sweepctl.fss.model import ScalingModel

#: quantities with confidence intervals, in report order
QUANTITIES = ("nu", "y", "x_c", "Gamma_c")


class FitError(ValueError):
    """Data or model unusable for a fit (the message says which and what to do)."""


@dataclass(frozen=True)
class ScalingData:
    """Points of one disorder/epsilon slice: widths N, couplings x, Γ and its error."""

    N: np.ndarray
    x: np.ndarray
    Gamma: np.ndarray
    Gamma_err: np.ndarray

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

    @property
    def size(self) -> int:
        return int(self.N.size)

    def widths(self) -> list[int]:
        return sorted({int(n) for n in self.N})

    def window(self, n_min: int) -> ScalingData:
        keep = self.N >= n_min
        return ScalingData(self.N[keep], self.x[keep], self.Gamma[keep], self.Gamma_err[keep])

    def with_gamma(self, gamma: np.ndarray) -> ScalingData:
        return ScalingData(self.N, self.x, gamma, self.Gamma_err)


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

    @property
    def p_value(self) -> float:
        return float(stats.chi2.sf(self.chi2, self.dof))

    def values(self) -> dict[str, float]:
        """ν, y, x_c, Γ_c (NaN when the model has no such parameter)."""
        p = self.model.unpack(self.theta)
        return {
            "nu": p["nu"],
            "y": p.get("y", math.nan),
            "x_c": p.get("x_c", 0.0),
            "Gamma_c": float(self.f[0]),
        }

    def linear_error(self, name: str) -> float:
        names = self.model.nonlinear_names()
        return float(self.theta_err[names.index(name)]) if name in names else math.nan


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


def starting_points(model: ScalingModel, data: ScalingData) -> list[np.ndarray]:
    """A small grid of starts: ν ∈ {1.5, 2.5, 4}, y ∈ {−0.5, −2}, x_c at the centre."""
    names = model.nonlinear_names()
    centre = float(np.average(data.x, weights=1 / data.Gamma_err**2))
    grids = {"nu": [1.5, 2.5, 4.0], "y": [-0.5, -2.0], "x_c": [centre]}
    axes = [grids.get(n, [0.0]) for n in names]
    return [np.array(p, dtype=float) for p in itertools.product(*axes)]


def _solve(model, data, start, lo, hi):
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
            max_nfev=2000,
        )
    return res


def fit(
    data: ScalingData,
    model: ScalingModel,
    *,
    n_min: int | None = None,
    starts: list[np.ndarray] | None = None,
) -> Fit:
    """Best fit of ``model`` to the points with N ≥ ``n_min`` (default: all).

    Parameters
    ----------
    data : ScalingData
        Γ with its standard errors.
    model : ScalingModel
        The scaling form (orders, symmetry, correction).
    n_min : int, optional
        Smallest width used.
    starts : list of ndarray, optional
        Starting points of the nonlinear parameters (default :func:`starting_points`).

    Returns
    -------
    Fit
        The lowest-χ² solution over the starts.
    """
    n_min = int(n_min if n_min is not None else min(data.widths()))
    d = data.window(n_min)
    _check(d, model)
    lo, hi = _bounds(model, d)
    best = None
    for s in starts if starts is not None else starting_points(model, d):
        res = _solve(model, d, s, lo, hi)
        if not np.all(np.isfinite(res.fun)):
            continue
        chi2 = float(res.fun @ res.fun)
        if best is None or chi2 < best[0]:
            best = (chi2, res)
    if best is None or best[0] >= 1e11:
        raise FitError(f"{model.describe()}: no start converged; try other orders")
    chi2, res = best
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
        chi2=chi2,
        dof=d.size - model.n_params,
        n_min=n_min,
        points_used=d.size,
        theta_err=err,
    )


def resample_chunk(
    data: ScalingData,
    model: ScalingModel,
    n_min: int,
    theta0: np.ndarray,
    seed: int,
    chunk: int,
    count: int,
) -> np.ndarray:
    """Estimates (rows: ν, y, x_c, Γ_c) refitted to ``count`` Gaussian resamples.

    Resample ``r`` of chunk ``c`` draws from ``SeedSequence(seed, spawn_key=(c,))``, so the
    result does not depend on how chunks are spread over workers.  A refit that fails
    gives a row of NaN (counted by the caller).
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(chunk,)))
    d = data.window(n_min)
    out = np.full((count, len(QUANTITIES)), math.nan)
    for r in range(count):
        g = d.Gamma + d.Gamma_err * rng.standard_normal(d.size)
        try:
            fr = fit(d.with_gamma(g), model, n_min=n_min, starts=[theta0])
        except FitError:
            continue
        v = fr.values()
        out[r] = [v[q] for q in QUANTITIES]
    return out


@dataclass
class Intervals:
    """Percentile confidence intervals from the resampled estimates."""

    level: float
    bounds: dict[str, tuple[float, float]]
    resamples: int
    failed: int


def intervals(estimates: np.ndarray, level: float = 0.95) -> Intervals:
    """Two-sided percentile intervals of each column of ``estimates`` (NaN rows dropped)."""
    ok = estimates[np.all(np.isfinite(estimates[:, [0, 3]]), axis=1)]
    q = [(1 - level) / 2 * 100, (1 + level) / 2 * 100]
    bounds = {}
    for c, name in enumerate(QUANTITIES):
        col = ok[:, c]
        col = col[np.isfinite(col)]
        bounds[name] = (
            tuple(float(v) for v in np.percentile(col, q)) if col.size else (math.nan, math.nan)
        )
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
    """CIs of ν, y, x_c, Γ_c by refitting ``resamples`` Gaussian resamples of ``data``.

    ``mapper(func, list_of_args)`` runs the chunks (default: in this process, in order);
    the driver passes one that spreads them over a Dask cluster.
    """
    jobs = [(data, best.model, best.n_min, best.theta, seed, c, k) for c, k in chunks(resamples)]
    if mapper is None:
        parts = [resample_chunk(*j) for j in jobs]
    else:
        parts = list(mapper(resample_chunk, jobs))
    return intervals(np.concatenate(parts, axis=0), level)
