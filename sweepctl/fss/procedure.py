"""The finite-size-scaling procedure shared by ``sweepctl fit``, ``sweepctl report`` and
the allocator: scan → stable choice → branches → resampled refit → sensitivity.

Steps (numpy/scipy only; the caller passes a ``mapper`` to spread resampling):

1. **Forms.**  Without fixed orders, every form up to ``max_orders`` (default
   :data:`DEFAULT_MAX_ORDERS`) is fitted at every smallest width N_min that leaves at
   least three widths (:data:`sweepctl.fss.scan.SCAN_MIN_WIDTHS`: on two, ν is an
   effective exponent, step 6), each fit exploring its nonlinear parameters globally
   (:func:`sweepctl.fss.fit.explore`); the stable choice is the fewest-parameter form
   whose ν is stable from an acceptable N_min on and determined there
   (:func:`sweepctl.fss.scan.stable_choice`; [M5] tests/REFERENCES.md).  With fixed
   orders, that one form is fitted (at the given N_min).
2. **Branches.**  The chosen window is explored again more thoroughly; every distinct
   minimum with p ≥ 0.1 and no parameter on a bound is a branch (at most
   :data:`MAX_BRANCHES`, lowest χ² first), unless the one physics criterion rules it
   out: leading-order dominance (:mod:`sweepctl.fss.criteria`; [M8]
   tests/REFERENCES.md) — its irrelevant-field terms may not carry more of Γ's
   x-dependence at the largest width than the relevant field.  The headline interval
   covers every branch that is not ruled out; the ruled-out fits are listed.  A stable
   form all of whose acceptable minima are ruled out is passed over for the next.
3. **Intervals.**  ``resamples`` (default 1000: ≈ 25 draws in each 2.5 % tail) resampled
   data sets are refitted from every branch's optimum (:func:`branch_intervals`); the
   headline interval of each quantity is the hull of the lowest-χ² refits' percentile
   interval and of every branch's own interval.
4. **Model choice.**  Every power-law form with a stable window and at most
   :data:`SPREAD_EXTRA_PARAMS` more parameters than the choice gives its acceptable
   minima there (those not ruled out); their range of ν and Γ_c is the model-choice
   spread, reported beside the statistical interval.  The data are **ambiguous** when
   two branches' ν intervals do not overlap, or when a stable form's (linearised) ν
   interval misses the headline interval: both are listed, so a reader sees the
   alternatives.
5. **Correction sensitivity.**  When the data cannot fit y — the choice has no free y, y
   ended on a bound, or its interval is wider than :data:`Y_UNRESOLVED_WIDTH` or reaches
   above ``Y_DESIGN[1]`` — the chosen orders (with an irrelevant field) are refitted with y
   fixed at each of :data:`Y_GRID` at every N_min.  ``nu_range`` and ``Gamma_c_range``
   span every acceptable fit that is not ruled out: branches, stable forms and fixed-y
   fits.
6. **Effective exponents** from adjacent widths (:mod:`sweepctl.fss.effective`).

When no form is acceptable the outcome says so (``acceptable`` False) and carries the
attempts; it has no headline.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

from sweepctl.fss.criteria import leading_order
from sweepctl.fss.effective import Dispersion, EffectiveExponent, dispersion, effective_exponents
from sweepctl.fss.fit import (
    NU_DESIGN,
    QUANTITIES,
    Y_DESIGN,
    Fit,
    FitError,
    Intervals,
    ScalingData,
    branch_intervals,
    explore,
)
from sweepctl.fss.model import Orders, ScalingModel
from sweepctl.fss.scan import (
    P_ACCEPT,
    SCAN_MIN_WIDTHS,
    Z95,
    ScanRow,
    candidate_models,
    determines_nu,
    stable_windows,
)

#: largest orders of the default scan (wide enough for φ⁴ terms, a φ²ψ₁ cross term and
#: nonlinear fields)
DEFAULT_MAX_ORDERS = Orders(4, 1, 3, 1)
#: default resamples: 25 draws in each 2.5 % tail, so the end points are stable to a few
#: per cent of the interval
DEFAULT_RESAMPLES = 1000
#: acceptable branches carried into the resampling (lowest χ² first)
MAX_BRANCHES = 4
#: design points per ν bin when the chosen window is explored for branches
BRANCH_PER_BIN = 3
#: forms with at most this many more parameters than the choice enter the spread
SPREAD_EXTRA_PARAMS = 2
#: y held fixed at these values when the data cannot fit it (correction sensitivity)
Y_GRID = (-2.0, -1.5, -1.0, -0.7, -0.5, -0.35, -0.2, -0.1)
#: a y interval wider than this is not a measurement of y
Y_UNRESOLVED_WIDTH = 1.0

Progress = Callable[[str, int, int], None]


def _acceptable(f: Fit) -> bool:
    return f.p_value >= P_ACCEPT and not f.at_bound


def admissible(f: Fit) -> bool:
    """Acceptable (p ≥ 0.1, no parameter on a bound) and not ruled out by leading-order
    dominance ([M8] tests/REFERENCES.md): the fits the procedure may report."""
    return _acceptable(f) and leading_order(f).ok


_admissible = admissible


def _row_fits(r: ScanRow) -> list[Fit]:
    return r.minima or ([r.fit] if r.fit is not None else [])


@dataclass
class Branch:
    """One acceptable minimum of the chosen form, with its own resampled intervals."""

    fit: Fit
    cis: Intervals | None = None


@dataclass
class Outcome:
    """Everything the procedure found for one slice (no printing, no files)."""

    data: ScalingData
    symmetric: bool
    mode: str  # "scan" or "form"
    max_orders: Orders | None
    rows: list[ScanRow]
    choice: ScanRow | None
    branches: list[Branch] = field(default_factory=list)
    headline: Intervals | None = None
    stable_forms: list[ScanRow] = field(default_factory=list)
    sensitivity: list[ScanRow] = field(default_factory=list)
    sensitivity_reason: str = ""
    effective: list[EffectiveExponent] = field(default_factory=list)
    #: the error bars checked width by width without a form (``effective.dispersion``)
    dispersion: Dispersion | None = None
    #: acceptable minima of the chosen window ruled out by the criterion
    rejected_branches: list[Fit] = field(default_factory=list)
    #: stable windows passed over because every acceptable minimum was ruled out
    rejected_forms: list[ScanRow] = field(default_factory=list)

    @property
    def acceptable(self) -> bool:
        return bool(self.branches)

    @property
    def best(self) -> Fit | None:
        return self.branches[0].fit if self.branches else None

    @property
    def branches_disagree(self) -> bool:
        """Two acceptable branches whose ν intervals do not overlap."""
        cis = [b.cis.bounds["nu"] for b in self.branches if b.cis is not None]
        return any(
            max(a[0], b[0]) > min(a[1], b[1]) for i, a in enumerate(cis) for b in cis[i + 1 :]
        )

    def disagreeing_forms(self) -> list[ScanRow]:
        """Stable forms none of whose acceptable minima has a (linearised) ν interval
        overlapping the headline interval: the choice of form moves ν."""
        lo, hi = self.interval("nu")
        out = []
        for r in self.stable_forms:
            if r is self.choice:
                continue
            cis = [
                (
                    f.values()["nu"] - Z95 * f.linear_error("nu"),
                    f.values()["nu"] + Z95 * f.linear_error("nu"),
                )
                for f in _row_fits(r)
                if _admissible(f)
            ]
            if cis and not any(max(a, lo) <= min(b, hi) for a, b in cis):
                out.append(r)
        return out

    @property
    def ambiguous(self) -> bool:
        """The data cannot decide ν: branches of the chosen form disagree, or another
        stable form disagrees with the headline interval."""
        return self.acceptable and (self.branches_disagree or bool(self.disagreeing_forms()))

    def effective_outside(self) -> EffectiveExponent | None:
        """The effective exponent of the two largest widths when its 95 % interval misses
        the headline interval of ν (corrections are large there, or the form is wrong),
        else None.  A warning for the reader, not part of any interval."""
        if not self.acceptable or not self.effective:
            return None
        e = self.effective[-1]
        if not (math.isfinite(e.nu) and math.isfinite(e.err)):
            return None
        lo, hi = self.interval("nu")
        if e.nu + Z95 * e.err < lo or e.nu - Z95 * e.err > hi:
            return e
        return None

    def interval(self, q: str) -> tuple[float, float]:
        """Headline interval of ``q``: the hull of the lowest-χ² refits' interval and of
        every branch's own (step 3 of the module docstring)."""
        parts = [self.headline.bounds[q]] if self.headline is not None else []
        parts += [b.cis.bounds[q] for b in self.branches if b.cis is not None]
        parts = [p for p in parts if math.isfinite(p[0]) and math.isfinite(p[1])]
        if not parts:
            return (math.nan, math.nan)
        return (min(p[0] for p in parts), max(p[1] for p in parts))

    def _spread_fits(self) -> list[Fit]:
        # a minimum that does not determine ν (its interval leaves 0.5–6) says nothing
        # about ν's spread or budget
        return [
            f
            for r in self.stable_forms
            for f in _row_fits(r)
            if _admissible(f) and determines_nu(f)
        ]

    def model_spread(self, q: str) -> tuple[float, float]:
        """Range of ``q`` over the acceptable minima of the stable forms (step 4)."""
        vals = [f.values()[q] for f in self._spread_fits()]
        vals += [b.fit.values()[q] for b in self.branches]
        vals = [v for v in vals if math.isfinite(v)]
        return (min(vals), max(vals)) if vals else (math.nan, math.nan)

    def nu_budget(self) -> tuple[float, float]:
        """ν's interval with the choice of form in it: the hull of the headline interval
        and of the linearised 95 % interval of every admissible minimum of the stable forms
        within :data:`SPREAD_EXTRA_PARAMS` of the choice (step 4).

        The model-choice spread of point values can sit inside a narrow headline interval
        while a form with more terms, as acceptable, says otherwise: measured on a
        rehearsal law with a ρ⁴ term (ν = 2.6, noise-free means with the error bars of
        8000 strips), the fewest-parameter form 2,0,1,0 gave [2.565, 2.587], while the
        law's own form 4,0,1,0 holds 2.6 (tests/fss/test_procedure.py).
        """
        lo, hi = self.interval("nu")
        if not (math.isfinite(lo) and math.isfinite(hi)):
            return (math.nan, math.nan)
        for f in self._spread_fits():
            nu, e = f.values()["nu"], f.linear_error("nu")
            if math.isfinite(nu) and math.isfinite(e):
                lo, hi = min(lo, nu - Z95 * e), max(hi, nu + Z95 * e)
        return (lo, hi)

    def sensitivity_fits(self) -> list[Fit]:
        return [f for r in self.sensitivity for f in _row_fits(r) if _admissible(f)]

    def ruled_out(self) -> list[tuple[str, Fit]]:
        """Every acceptable fit the criterion ruled out, with where it came from
        (``branch``, ``form`` or ``fixed y``), lowest χ² first within each."""
        out = [("branch", f) for f in self.rejected_branches]
        out += [("form", f) for r in self.rejected_forms for f in _row_fits(r) if _acceptable(f)]
        for kind, rows in (("form", self.stable_forms), ("fixed y", self.sensitivity)):
            out += [
                (kind, f)
                for r in rows
                for f in _row_fits(r)
                if _acceptable(f) and not leading_order(f).ok
            ]
        seen, unique = set(), []
        for kind, f in out:
            key = (f.model, f.n_min, round(f.chi2, 9))
            if key not in seen:
                seen.add(key)
                unique.append((kind, f))
        return unique

    def value_range(self, q: str) -> tuple[float, float]:
        """Range of ``q`` over every acceptable fit: branches, stable forms, fixed-y fits."""
        fits = [b.fit for b in self.branches] + self._spread_fits() + self.sensitivity_fits()
        vals = [f.values()[q] for f in fits]
        vals = [v for v in vals if math.isfinite(v)]
        return (min(vals), max(vals)) if vals else (math.nan, math.nan)


def _fit_rows(data, models, widths, progress, stage, per_bin=1) -> list[ScanRow]:
    jobs = [
        (m, n)
        for m in models
        for n in widths
        if len([w for w in widths if w >= n]) >= SCAN_MIN_WIDTHS
    ]
    rows = []
    for k, (m, n) in enumerate(jobs):
        try:
            minima = explore(data, m, n_min=n, per_bin=per_bin)
            rows.append(ScanRow(m, n, minima[0], minima=minima))
        except FitError as exc:
            rows.append(ScanRow(m, n, None, str(exc)))
        if progress is not None:
            progress(stage, k + 1, len(jobs))
    return rows


def stable_forms(data: ScalingData, symmetric: bool, max_orders: Orders) -> list[ScanRow]:
    """Step 1 alone: every form up to ``max_orders`` at every N_min, and the stable
    windows among them, the choice first (what the allocator fits each round)."""
    models = candidate_models(max_orders, symmetric, with_log=False)
    return stable_windows(_fit_rows(data, models, data.widths(), None, "scanning"))


def run(
    data: ScalingData,
    *,
    symmetric: bool,
    orders: Orders | None = None,
    correction: str = "power",
    n_min: int | None = None,
    max_orders: Orders = DEFAULT_MAX_ORDERS,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
    level: float = 0.95,
    mapper=None,
    progress: Progress | None = None,
) -> Outcome:
    """The whole procedure on one slice (module docstring).

    Parameters
    ----------
    data : ScalingData
        The slice's points.
    symmetric : bool
        Duality-symmetric forms ([K7] tests/REFERENCES.md).
    orders : Orders, optional
        Fit this one form instead of scanning; ``correction`` and ``n_min`` apply to it.
    max_orders : Orders
        Largest orders of the scan.
    resamples, seed, level
        Resampled intervals (:func:`sweepctl.fss.fit.branch_intervals`).
    mapper : callable, optional
        ``mapper(func, jobs)`` for the resampling chunks.
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    Outcome
    """
    widths = data.widths()
    if orders is not None:
        model = ScalingModel(orders, symmetric=symmetric, correction=correction)
        n0 = n_min if n_min is not None else widths[0]
        minima = explore(data, model, n_min=n0, per_bin=BRANCH_PER_BIN)
        row = ScanRow(model, n0, minima[0], minima=minima)
        ok = any(_admissible(f) for f in minima)
        out = Outcome(data, symmetric, "form", None, [row], row if ok else None)
        if not ok:
            out.rejected_branches = [
                f for f in minima if _acceptable(f) and not leading_order(f).ok
            ]
    else:
        models = candidate_models(max_orders, symmetric, with_log=False)
        use = [w for w in widths if n_min is None or w >= n_min]
        rows = _fit_rows(data, models, use, progress, "scanning")
        stable = stable_windows(rows)
        passed = [r for r in stable if any(_admissible(f) for f in _row_fits(r))]
        choice = passed[0] if passed else None
        out = Outcome(data, symmetric, "scan", max_orders, rows, choice)
        out.rejected_forms = [r for r in stable if r not in passed]
        if choice is not None:
            out.stable_forms = [
                r for r in passed if r.model.n_params <= choice.model.n_params + SPREAD_EXTRA_PARAMS
            ]
    out.effective = effective_exponents(data, symmetric)
    out.dispersion = dispersion(data, symmetric)
    if out.choice is None:
        return out
    # -- branches of the chosen window, explored more thoroughly
    c = out.choice
    minima = explore(data, c.model, n_min=c.n_min, per_bin=BRANCH_PER_BIN)
    minima += [f for f in c.minima if not any(abs(f.chi2 - g.chi2) < 1e-9 for g in minima)]
    minima.sort(key=lambda f: f.chi2)
    branches = [f for f in minima if _admissible(f)]
    out.rejected_branches = [f for f in minima if _acceptable(f) and not leading_order(f).ok]
    if not branches:
        # the thorough exploration found only ruled-out minima: no headline
        out.choice = None
        return out
    kept: list[Fit] = []
    for f in branches:
        if not any(_close_nu(f, g) for g in kept):
            kept.append(f)
    kept = kept[:MAX_BRANCHES]
    headline, per_branch = branch_intervals(
        data, kept, resamples=resamples, seed=seed, level=level, mapper=mapper
    )
    out.branches = [Branch(f, ci) for f, ci in zip(kept, per_branch, strict=True)]
    out.headline = headline
    # -- correction sensitivity
    reason = _y_unresolved(out)
    if reason:
        out.sensitivity_reason = reason
        o = c.model.orders
        base = Orders(o.n_R, max(1, o.n_I), o.m_R, o.m_I)
        fixed = [ScalingModel(base, symmetric=symmetric, fixed_y=y) for y in Y_GRID]
        use = [w for w in widths if n_min is None or w >= n_min]
        out.sensitivity = _fit_rows(data, fixed, use, progress, "fixed-y fits")
    return out


def _close_nu(a: Fit, b: Fit) -> bool:
    """Same branch for reporting: ν within the larger linearised standard error."""
    s = max(a.linear_error("nu"), b.linear_error("nu"))
    s = s if math.isfinite(s) else 0.0
    return abs(a.values()["nu"] - b.values()["nu"]) <= max(s, 1e-3 * a.values()["nu"])


def _y_unresolved(out: Outcome) -> str:
    """Why the data cannot fit y (empty: they can); step 5 of the module docstring."""
    m = out.best.model
    if not m.has_irrelevant:
        return "the chosen form has no irrelevant field"
    if not m.has_y:
        return "the chosen form has no fitted y"
    if "y" in out.best.at_bound:
        return "y ended on a bound of the search"
    lo, hi = out.interval("y")
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return "y has no interval"
    if hi - lo > Y_UNRESOLVED_WIDTH:
        return f"the 95 % interval of y, [{lo:.2f}, {hi:.2f}], is wider than {Y_UNRESOLVED_WIDTH:g}"
    if hi > Y_DESIGN[1]:
        return f"the 95 % interval of y, [{lo:.2f}, {hi:.2f}], reaches y ≈ 0"
    return ""


__all__ = [
    "DEFAULT_MAX_ORDERS",
    "DEFAULT_RESAMPLES",
    "NU_DESIGN",
    "QUANTITIES",
    "Y_GRID",
    "Branch",
    "Outcome",
    "admissible",
    "run",
    "stable_forms",
]
