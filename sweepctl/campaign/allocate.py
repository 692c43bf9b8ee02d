"""Fit-aware allocation: the next replicas go where they shrink ν's interval most per CPU-second.

Pure and I/O-free: the input is, per point, the complete stored prefix of replicas
``0..R-1`` (their strip values of Γ), the CPU seconds one more replica costs there (from
:class:`~sweepctl.campaign.cost.CostModel`) and the point's replica cap; per slice, a fit
of one scaling form (:class:`~sweepctl.fss.fit.Fit`).  The output is the replica count
each point should reach and, when nothing more is worth scheduling, why.  Nothing depends
on timing or on the order in which workers finished: a resumed or differently scheduled
campaign that stores the same prefixes gets the same decisions.

Criterion (linearised; [M5] tests/REFERENCES.md for the form)
--------------------------------------------------------------
Point i of a slice has n_i replicas of s_i strips; its strip values have sample
variance v_i, so its mean Γ̄_i has variance σ_i² = v_i/(n_i s_i) ∝ 1/n_i.  Linearise the
scaling form F(x, N; β) about the fit, β = (θ, f) all k parameters, with J_i = ∂F_i/∂β
(:func:`sweepctl.fss.fit.jacobian`).  Weighted least squares with W = diag(1/σ_i²) then
has covariance (JᵀWJ)⁻¹ (Gauss–Markov), and

    Var(ν) = e_νᵀ I⁻¹ e_ν,    I = JᵀWJ = Σ_i (n_i s_i / v_i) J_iᵀ J_i.

The f are included in β, so the variance of ν already accounts for the profiled linear
coefficients (the Schur complement of their block, which is what the variable-projection
fit's own linearised error is at zero residual).  One more replica at i adds
c_i J_iᵀ J_i with c_i = s_i/v_i, a rank-one change; by Sherman–Morrison

    Var'(ν) = Var(ν) − c_i g_i² / (1 + c_i h_i),   g_i = J_i I⁻¹ e_ν,  h_i = J_i I⁻¹ J_iᵀ,

exact for the linearised model, with diminishing returns built in (h_i is the point's
leverage).  The gain per CPU-second is that reduction over the replica's cost; across
slices it is measured in units of the slice's goal variance, (h/z₉₅)², so that a slice
far from its goal is not starved by one that is nearly there.  Replicas are added one
at a time, greedily (the largest gain per second next, I⁻¹ updated by Sherman–Morrison),
until every slice's projected half-width z₉₅·√Var(ν) is below its goal by the margin
:data:`MARGIN`, the round's CPU reaches ``growth − 1`` times what the prefixes cost (a
round trusts a linearisation made on the data so far only that far), or the budget is
spent.  v_i is the sample variance of the point's own strips (≥ 51 of them before any
point may stop, [S1]): the law Var = k·N·Γ/L of [R1] holds on the clean network, the
sample variance also with disorder.

A slice without a fit (too few data for any acceptable form) grows uniformly, each
point by ``growth − 1`` times its replicas: a longer pilot.

Ambiguous slices
----------------
While the slice's data cannot decide ν — another acceptable minimum of the chosen form
(a branch), or the best acceptable minimum of another stable form with at most
``SPREAD_EXTRA_PARAMS`` more parameters, has a linearised 95 % ν interval that misses
the choice's (the linearised counterpart of the procedure's ``ambiguous``,
:mod:`sweepctl.fss.procedure`) — the next replicas also go where the alternatives'
predictions F_a differ from the choice's. One replica at i raises the χ² by which the
data separate alternative a from the choice, D_a = Σ_i (ΔF_ia/σ_i)², by c_i ΔF_ia²; the
score per CPU-second adds Σ_a c_i ΔF_ia² / :data:`SEPARATION` over the alternatives not
yet separated (projected D_a < :data:`SEPARATION`). A slice with an unseparated
alternative is open even when its half-width is within the goal, so "goal met" needs an
unambiguous slice.

The floor
---------
A point whose relative error misses ``precision.target`` (or that has fewer than the
minimum strip values) first gets what :func:`~sweepctl.campaign.plan.next_target` asks
for, as without a goal; those replicas count towards ν's information like any other.

Stop reasons
------------
When a round adds nothing: ``"goal met"`` (every slice's linearised half-width is within
its goal and every point meets the floor), ``"budget spent"`` (no affordable replica
remains), ``"no point can improve it"`` (every point that informs ν is at its cap, or no
replica changes Var(ν) measurably).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from sweepctl.campaign.plan import next_target
from sweepctl.campaign.recipe import Point
from sweepctl.fss.fit import Fit, ScalingData, jacobian
from sweepctl.fss.procedure import (
    DEFAULT_MAX_ORDERS,
    DEFAULT_RESAMPLES,
    SPREAD_EXTRA_PARAMS,
    admissible,
    stable_forms,
)
from sweepctl.fss.procedure import run as run_procedure
from sweepctl.fss.scan import SCAN_MIN_WIDTHS, Z95, determines_nu

__all__ = [
    "BUDGET_SPENT",
    "GOAL_MET",
    "NO_IMPROVEMENT",
    "Allocation",
    "PointState",
    "SliceDesign",
    "SliceState",
    "allocate",
    "fit_slice",
    "fit_slice_branches",
    "slice_data",
]

GOAL_MET = "goal met"
BUDGET_SPENT = "budget spent"
NO_IMPROVEMENT = "no point can improve it"
#: the goal check (progress.GoalRounds) failed CHECK_STALLS times in a row without its
#: budget narrowing by CHECK_NARROWING: more replicas on the steering form do not shrink
#: what `sweepctl fit` reports (a gap between forms, or no acceptable form)
CHECK_STALLED = "sweepctl fit's interval does not narrow"
CHECK_STALLS = 3
CHECK_NARROWING = 0.9

#: a round aims at Var(ν) ≤ (goal/z₉₅)²/MARGIN: the same 20 % head-room the per-point
#: rule (:func:`~sweepctl.campaign.plan.next_target`) gives its replica counts
MARGIN = 1.2
#: a round spends at most (GROWTH − 1) × the prefixes' CPU: a linearisation on the data
#: so far is trusted for a doubling, then the slice is fitted again
GROWTH = 2.0
#: a replica that lowers Var(ν) by less than this fraction changes nothing measurable
#: (rounding in the rank-one update is ~1e-13 for a well-conditioned I)
MIN_RELATIVE_GAIN = 1e-9
#: χ² by which the data must separate an alternative's predictions from the choice's
#: before it stops drawing replicas: 2σ on one degree of freedom each way, (2·z₉₅)²
SEPARATION = (2.0 * Z95) ** 2
#: rounds a campaign spends on separating alternatives once ν's half-width is within the
#: goal: refits move both forms, so the linearised separation can chase them for ever
#: (observed on the network kernel at N = 4–8, DEVELOPERS.md)
SEPARATION_ROUNDS = 2


@dataclass(frozen=True)
class PointState:
    """One point as a decision sees it.

    Parameters
    ----------
    point
        The point (its key orders ties).
    prefix
        Strip values of Γ of replicas ``0..R-1``, all complete (one array per replica).
    replica_seconds
        CPU seconds of one more replica here (``CostModel.replica_seconds``).
    max_replicas
        The point's replica cap.
    """

    point: Point
    prefix: tuple[np.ndarray, ...]
    replica_seconds: float
    max_replicas: int

    @property
    def replicas(self) -> int:
        return len(self.prefix)

    def strips(self) -> np.ndarray:
        return np.concatenate(self.prefix) if self.prefix else np.zeros(0)


@dataclass(frozen=True)
class SliceState:
    """A disorder/ε slice: its points and a fit of one scaling form to their prefixes.

    ``fit`` is None while the slice cannot be fitted (then only the floor applies).
    ``nu_halfwidth`` is the goal's 95 % half-width of ν.
    """

    key: str
    points: tuple[PointState, ...]
    fit: Fit | None
    nu_halfwidth: float
    #: fits whose ν disagrees with ``fit``'s (branches, other stable forms): while there
    #: are any, replicas also go where their predictions differ (module docstring)
    alternatives: tuple[Fit, ...] = ()


#: largest orders the allocator's form choice scans (those of ``sweepctl fit``)
MAX_ORDERS = DEFAULT_MAX_ORDERS


def fit_slice(data: ScalingData, symmetric: bool) -> Fit | None:
    """The slice's fit the allocator linearises (:func:`fit_slice_branches`), or None
    when no form is stable yet."""
    return fit_slice_branches(data, symmetric)[0]


def _nu_ci(f: Fit) -> tuple[float, float]:
    nu, s = f.values()["nu"], f.linear_error("nu")
    s = s if math.isfinite(s) else 0.0
    return (nu - Z95 * s, nu + Z95 * s)


def _disjoint(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return max(a[0], b[0]) > min(a[1], b[1])


def fit_slice_branches(data: ScalingData, symmetric: bool) -> tuple[Fit | None, tuple[Fit, ...]]:
    """The fit the allocator linearises and the alternatives that disagree with it.

    The form rule: of the stable forms (:func:`sweepctl.fss.procedure.stable_forms`, the
    scan of ``sweepctl fit`` up to :data:`MAX_ORDERS` at every N_min) with at most
    ``SPREAD_EXTRA_PARAMS`` more parameters than the fewest-parameter one — the forms
    whose spread the procedure reports beside its interval — the one with the widest
    linearised ν interval (the first of equals in the scan's order). Steering by the
    fewest-parameter form alone let a truncated form's bias through: on the rehearsal
    law with a ρ⁴ term it put the replicas where that form is most wrong, and its ν
    intervals covered the law's ν less often than uniform precision did
    (tests/benchmarks/bench_allocation.py, DEVELOPERS.md).

    Only fits ``sweepctl fit`` may report count (:func:`sweepctl.fss.procedure.
    admissible`: acceptable and not ruled out by leading-order dominance, [M8]
    tests/REFERENCES.md); without that, on the rehearsal law of recipes/rehearsal.toml
    the rule steered by the trap minima at ν ≈ 1.6 (wider intervals) and the rounds
    ended "no point can improve it" at ν = 1.62 ± 0.10 for a law with ν = 2.6.

    Alternatives (module docstring, "Ambiguous slices"): other admissible minima of the
    chosen form, and the best admissible minimum of each of those stable forms none of
    whose admissible minima overlaps the choice's ν interval. Deterministic (fixed
    design seeds), so a replay of the rounds fits the same forms.
    """
    if len(data.widths()) < SCAN_MIN_WIDTHS:
        return None, ()
    # the forms `sweepctl fit` may report: stable, with a minimum that is acceptable and
    # not ruled out by leading-order dominance ([M8]); each steered by its best such one
    rows = []
    for r in stable_forms(data, symmetric, MAX_ORDERS):
        ok = [f for f in (r.minima or [r.fit]) if admissible(f) and determines_nu(f)]
        if ok:
            rows.append((r, ok))
    if not rows:
        return None, ()
    fewest = rows[0][0].model.n_params
    near = [(r, ok) for r, ok in rows if r.model.n_params <= fewest + SPREAD_EXTRA_PARAMS]

    def width(ok) -> float:
        e = ok[0].linear_error("nu")
        return e if math.isfinite(e) else -math.inf

    choice = near[0]
    for item in near[1:]:
        if width(item[1]) > width(choice[1]):
            choice = item
    best = choice[1][0]
    ci = _nu_ci(best)
    alts = [f for f in choice[1][1:] if _disjoint(_nu_ci(f), ci)]
    for r, ok in near:
        if r is choice[0]:
            continue
        if all(_disjoint(_nu_ci(f), ci) for f in ok):
            alts.append(ok[0])
    return best, tuple(alts)


@dataclass(frozen=True)
class Check:
    """What ``sweepctl fit`` reports for a slice whose linearised half-width met the goal:
    ν and its 95 % interval with the choice of form in it (:meth:`sweepctl.fss.procedure.
    Outcome.nu_budget`: the resampled headline interval, every branch not ruled out, and
    the stable forms' intervals)."""

    nu: float
    lo: float
    hi: float

    @property
    def halfwidth(self) -> float:
        """Half the budget's width (infinite without an acceptable form)."""
        w = 0.5 * (self.hi - self.lo)
        return w if math.isfinite(w) else math.inf

    def as_dict(self) -> dict:
        def fin(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None

        return {
            "nu": fin(self.nu),
            "nu_ci": [fin(self.lo), fin(self.hi)],
            "halfwidth": fin(self.halfwidth),
        }


#: resampled refits of the goal check (as ``sweepctl fit``'s default) and their seed
CHECK_RESAMPLES = DEFAULT_RESAMPLES
CHECK_SEED = 0


def check_slice(data: ScalingData, symmetric: bool) -> Check:
    """The full procedure of ``sweepctl fit`` on one slice, in process, with its default
    settings (:func:`sweepctl.fss.procedure.run`): the check a linearised "goal met" must
    pass. Deterministic (fixed resampling seed), so a replay repeats it."""
    nan = math.nan
    if len(data.widths()) < SCAN_MIN_WIDTHS:
        return Check(nan, nan, nan)
    out = run_procedure(data, symmetric=symmetric, resamples=CHECK_RESAMPLES, seed=CHECK_SEED)
    if not out.acceptable:
        return Check(nan, nan, nan)
    lo, hi = out.nu_budget()
    return Check(out.best.values()["nu"], lo, hi)


def slice_data(points: tuple[PointState, ...] | list[PointState]) -> ScalingData:
    """Γ̄, its standard error and the strip count per point (what the slice's fit uses).

    Points with fewer than two strip values are left out (no error bar yet).
    """
    rows = [(p, p.strips()) for p in points]
    rows = [(p, g) for p, g in rows if g.size >= 2]
    return ScalingData(
        N=np.array([p.point.width for p, _ in rows], float),
        x=np.array([p.point.x for p, _ in rows], float),
        Gamma=np.array([float(np.mean(g)) for _, g in rows]),
        Gamma_err=np.array([float(np.std(g, ddof=1) / math.sqrt(g.size)) for _, g in rows]),
        n_strips=np.array([g.size for _, g in rows], float),
    )


class SliceDesign:
    """The linearised information on ν of one slice (module docstring).

    Rows are the points of the fit's window (N ≥ ``fit.n_min``) with at least two strip
    values; ``index`` maps them back to positions in ``slice_.points``.
    """

    def __init__(self, slice_: SliceState) -> None:
        fit = slice_.fit
        if fit is None:
            raise ValueError("a slice without a fit has no design")
        self.slice = slice_
        keep = []
        for i, p in enumerate(slice_.points):
            g = p.strips()
            if p.point.width >= fit.n_min and g.size >= 2:
                keep.append((i, p, g))
        self.index = np.array([i for i, _, _ in keep], dtype=int)
        x = np.array([p.point.x for _, p, _ in keep], float)
        n = np.array([p.point.width for _, p, _ in keep], float)
        self.J = jacobian(fit.model, fit.theta, fit.f, x, n)
        var = np.array([float(np.var(g, ddof=1)) for _, _, g in keep])
        tiny = np.finfo(float).tiny
        #: information per strip value, 1/v_i, and strips per replica s_i
        self.per_strip = 1.0 / np.maximum(var, tiny)
        self.per_replica = np.array([g.size / p.replicas for _, p, g in keep], float)
        self.strips = np.array([g.size for _, _, g in keep], float)
        self.nu = fit.model.nonlinear_names().index("nu")
        info = (self.J * (self.strips * self.per_strip)[:, None]).T @ self.J
        self.cov = np.linalg.pinv(info, hermitian=True)
        #: the fit itself determines ν (a pseudo-inverse drops near-null directions and
        #: would report a small Var(ν) for a fit whose own ν error is 10⁴: measured on a
        #: rehearsal slice, orders 2,1,1,0 at N ≥ 16)
        self.determined = determines_nu(fit)
        #: ΔF_ia = F_a − F of each alternative a at each row, and D_a = Σ_i (ΔF_ia/σ_i)²
        base = fit.model.evaluate(fit.theta, fit.f, x, n)
        cols = []
        for alt in slice_.alternatives:
            with np.errstate(all="ignore"):
                d = alt.model.evaluate(alt.theta, alt.f, x, n) - base
            cols.append(np.where(np.isfinite(d), d, 0.0))
        self.delta = np.column_stack(cols) if cols else np.zeros((x.size, 0))
        self.separation = (self.delta**2 * (self.strips * self.per_strip)[:, None]).sum(axis=0)

    def var_nu(self) -> float:
        """Var(ν) = [(JᵀWJ)⁻¹]_νν of the current design."""
        return float(self.cov[self.nu, self.nu])

    def halfwidth(self) -> float:
        """Linearised 95 % half-width z₉₅·√Var(ν); infinite when the fit does not
        determine ν (:attr:`determined`)."""
        if not self.determined:
            return math.inf
        return Z95 * math.sqrt(max(self.var_nu(), 0.0))

    def gains(self) -> np.ndarray:
        """Reduction of Var(ν) by one more replica at each row (Sherman–Morrison)."""
        c = self.per_replica * self.per_strip
        a = self.J @ self.cov  # rows J_i I⁻¹
        g = a[:, self.nu]
        h = np.einsum("ij,ij->i", a, self.J)
        return c * g * g / (1.0 + c * h)

    def unseparated(self) -> np.ndarray:
        """Alternatives the data do not yet separate from the choice (D_a < SEPARATION)."""
        return self.separation < SEPARATION

    def separation_gains(self) -> np.ndarray:
        """Σ_a c_i ΔF_ia² / SEPARATION over the unseparated alternatives, per row."""
        open_ = self.unseparated()
        if not open_.any():
            return np.zeros(self.J.shape[0])
        c = self.per_replica * self.per_strip
        return c * (self.delta[:, open_] ** 2).sum(axis=1) / SEPARATION

    def add(self, row: int, replicas: int = 1) -> None:
        """Update I⁻¹ (rank one) and the separations for ``replicas`` more at ``row``."""
        c = replicas * self.per_replica[row] * self.per_strip[row]
        u = self.cov @ self.J[row]
        self.cov -= np.outer(u, u) * (c / (1.0 + c * float(self.J[row] @ u)))
        self.strips[row] += replicas * self.per_replica[row]
        self.separation += c * self.delta[row] ** 2


@dataclass
class Allocation:
    """The next round: replica count each point should reach, and the state of each slice.

    ``wanted`` maps point keys to a count ≥ the prefix's; ``reason`` is None while the
    round schedules something, else one of :data:`GOAL_MET`, :data:`BUDGET_SPENT`,
    :data:`NO_IMPROVEMENT` (or, from the goal rounds' check, :data:`CHECK_STALLED`).
    ``halfwidth`` / ``projected`` are each slice's linearised
    95 % half-width of ν now and after the round (NaN for a slice without a fit).
    """

    wanted: dict[str, int]
    reason: str | None
    seconds: float
    halfwidth: dict[str, float] = field(default_factory=dict)
    projected: dict[str, float] = field(default_factory=dict)

    def new_replicas(self, slices: list[SliceState]) -> int:
        have = {p.point.key: p.replicas for s in slices for p in s.points}
        return sum(w - have[k] for k, w in self.wanted.items())


def allocate(
    slices: list[SliceState],
    *,
    target: float,
    min_estimates: int,
    budget_seconds: float,
    growth: float = GROWTH,
    margin: float = MARGIN,
    separate: bool = True,
) -> Allocation:
    """Decide the next round of a campaign with a goal on ν (module docstring).

    Parameters
    ----------
    slices
        Every slice with its points' complete prefixes and a fit (or None).
    target
        ``precision.target``: the floor on each point's relative error.
    min_estimates
        Strip values a point needs before it may stop (the frozen minimum).
    budget_seconds
        CPU seconds the campaign may still spend (budget minus what is stored).
    growth, margin
        Round size limit and head-room (:data:`GROWTH`, :data:`MARGIN`).
    separate
        Spend replicas on separating alternatives (False: they neither draw replicas nor
        keep a slice open; :class:`~sweepctl.campaign.progress.GoalRounds` gives up on
        them after :data:`SEPARATION_ROUNDS` rounds).

    Returns
    -------
    Allocation
        A pure function of the arguments: slices and points are visited in key order,
        and ties go to the first point in that order.
    """
    slices = sorted(slices, key=lambda s: s.key)
    points = [p for s in slices for p in sorted(s.points, key=lambda q: q.point.key)]
    wanted = {p.point.key: p.replicas for p in points}
    left = float(budget_seconds)
    spent = 0.0
    short_of_budget = False

    # the floor first: what the per-point rule asks of points that miss the target (a
    # capped point has nothing more to give)
    floor_met = True
    for p in points:
        want = next_target(list(p.prefix), target, p.max_replicas, min_estimates)
        if want <= p.replicas:
            continue
        floor_met = False
        afford = (
            int(left // p.replica_seconds)
            if p.replica_seconds > 0 and math.isfinite(left)
            else want
        )
        add = min(want - p.replicas, afford)
        short_of_budget = short_of_budget or add < want - p.replicas
        wanted[p.point.key] += add
        left -= add * p.replica_seconds
        spent += add * p.replica_seconds

    # a slice that cannot be fitted yet, or whose fit does not determine ν
    # (SliceDesign.determined), grows uniformly (a longer pilot), within the
    # round size and the budget
    unfit = {s.key for s in slices if s.fit is None or not determines_nu(s.fit)}
    for s in slices:
        if s.key not in unfit:
            continue
        for p in sorted(s.points, key=lambda q: q.point.key):
            add = min(
                math.ceil((growth - 1.0) * p.replicas),
                p.max_replicas - wanted[p.point.key],
            )
            afford = (
                int(left // p.replica_seconds)
                if p.replica_seconds > 0 and math.isfinite(left)
                else add
            )
            short_of_budget = short_of_budget or afford < add
            add = max(0, min(add, afford))
            wanted[p.point.key] += add
            left -= add * p.replica_seconds
            spent += add * p.replica_seconds

    # then ν: the design of every fitted slice, the floor's replicas included
    designs: dict[str, SliceDesign] = {}
    halfwidth: dict[str, float] = {}
    for s in slices:
        if s.key in unfit:
            halfwidth[s.key] = math.nan if s.fit is None else math.inf
            continue
        d = SliceDesign(s)
        halfwidth[s.key] = d.halfwidth()
        for row, i in enumerate(d.index):
            extra = wanted[s.points[i].point.key] - s.points[i].replicas
            if extra:
                d.add(row, extra)
        designs[s.key] = d
    goals_met = all(
        s.key not in unfit
        and halfwidth[s.key] <= s.nu_halfwidth
        and not (separate and designs[s.key].unseparated().any())
        for s in slices
    )

    prefix_cpu = sum(p.replicas * p.replica_seconds for p in points)
    # growth = inf: no round limit (a projection to the goal, not a round)
    round_limit = math.inf if math.isinf(growth) else max((growth - 1.0) * prefix_cpu, spent)
    # slices still short of their goal, each with its rows' keys, costs, counts and caps
    open_: list[tuple[str, SliceDesign, float, list[str], np.ndarray, np.ndarray, np.ndarray]]
    open_ = []
    for s in slices:
        if s.key not in designs:
            continue
        d = designs[s.key]
        if halfwidth[s.key] <= s.nu_halfwidth and not (separate and d.unseparated().any()):
            continue
        rows = [s.points[i] for i in d.index]
        open_.append(
            (
                s.key,
                d,
                (s.nu_halfwidth / Z95) ** 2 / margin,
                [p.point.key for p in rows],
                np.array([p.replica_seconds for p in rows], float),
                np.array([wanted[p.point.key] for p in rows], dtype=np.int64),
                np.array([p.max_replicas for p in rows], dtype=np.int64),
            )
        )
    while True:
        best = None  # (score, position in open_, row)
        for j, (_, d, aim, _, cost, count, cap) in enumerate(open_):
            var = d.var_nu()
            # ν's variance in units of the goal's, plus the separation of alternatives
            gains = d.gains() / aim if var > aim else np.zeros(count.size)
            if separate:
                gains = gains + d.separation_gains()
            useful = (count < cap) & (gains > MIN_RELATIVE_GAIN * max(var / aim, 1.0))
            if not useful.any():
                continue
            ok = useful & (cost <= left)
            short_of_budget = short_of_budget or bool((useful & ~ok).any())
            if not ok.any():
                continue
            score = np.where(ok, gains / cost, -np.inf)
            row = int(np.argmax(score))  # the first of equals: key order
            if best is None or score[row] > best[0]:
                best = (float(score[row]), j, row)
        if best is None:
            break
        _, j, row = best
        _, d, _, keys, cost, count, _ = open_[j]
        if spent > 0.0 and spent + cost[row] > round_limit:
            break
        d.add(row)
        count[row] += 1
        wanted[keys[row]] += 1
        left -= float(cost[row])
        spent += float(cost[row])

    projected = {
        s.key: designs[s.key].halfwidth() if s.key in designs else math.nan for s in slices
    }
    reason = None
    if spent == 0.0:
        if goals_met and floor_met:
            reason = GOAL_MET
        elif short_of_budget:
            reason = BUDGET_SPENT
        else:
            reason = NO_IMPROVEMENT
    return Allocation(
        wanted=wanted, reason=reason, seconds=spent, halfwidth=halfwidth, projected=projected
    )
