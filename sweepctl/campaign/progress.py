"""Per-point round bookkeeping, replayed from stored rows; the preview of a run.

The same replay serves the driver (what to submit), ``status`` (what is left) and
``plan --store`` (what a run would do), so the three cannot disagree.

With a ``[goal]`` the rounds are the campaign's, not each point's: a point never
advances on its own (:meth:`PointProgress.decide` leaves it), and once every point's
current prefix is complete :class:`GoalRounds` fits each disorder/ε slice and asks
:func:`~sweepctl.campaign.allocate.allocate` for the next round. Round k depends only on
the prefixes round k − 1 wanted, so replaying from stored rows repeats every decision.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from sweepctl.campaign.plan import Frozen, next_target, relative_error
from sweepctl.campaign.recipe import Point, Recipe

__all__ = [
    "GoalRounds",
    "PointProgress",
    "RunPreview",
    "build_progress",
    "fit_slice_key",
    "preview_run",
    "replica_price",
]


@dataclass
class PointProgress:
    """Round bookkeeping of one point."""

    point: Point
    layers: int
    warmup: int
    max_replicas: int
    target: float
    min_estimates: int = 0
    done: dict[int, np.ndarray] = field(default_factory=dict)
    wanted: int = 0
    finished: bool = False
    failed: bool = False
    #: rounds are decided for the whole campaign (:class:`GoalRounds`), not here
    goal: bool = False

    def prefix_complete(self) -> bool:
        return all(r in self.done for r in range(self.wanted))

    def decide(self) -> None:
        """Advance the round structure as far as complete prefixes allow."""
        while not self.goal and not self.finished and self.prefix_complete():
            nt = next_target(
                [self.done[r] for r in range(self.wanted)],
                self.target,
                self.max_replicas,
                self.min_estimates,
            )
            if nt <= self.wanted:
                self.finished = True
            else:
                self.wanted = nt

    def missing(self) -> list[int]:
        """Replica indices of the current round not yet stored."""
        return [r for r in range(self.wanted) if r not in self.done]

    def strip_values(self) -> np.ndarray:
        if not self.done:
            return np.array([])
        return np.concatenate([self.done[r] for r in sorted(self.done)])

    def rel_err(self) -> float:
        if not self.done:
            return math.inf
        return relative_error(self.strip_values())

    @property
    def reached(self) -> bool:
        return self.rel_err() <= self.target and self.strip_values().size >= self.min_estimates

    @property
    def capped(self) -> bool:
        return self.finished and not self.failed and not self.reached


def build_progress(
    recipe: Recipe, frozen: Frozen, rows: pa.Table | None
) -> dict[str, PointProgress]:
    """Per-point progress from the recipe and the rows already stored.

    ``rows`` needs the columns ``point_key``, ``replica`` and ``gamma_strips`` and must
    come from :meth:`Store.read_replicas` (one row per replica).
    """
    by_key: dict[str, PointProgress] = {}
    min_reps = frozen.min_replicas()
    for p in recipe.points():
        cap = frozen.max_replicas(p)
        by_key[p.key] = PointProgress(
            point=p,
            layers=frozen.layers_for(p),
            warmup=frozen.warmup_for(p.width),
            max_replicas=cap,
            target=recipe.target,
            min_estimates=frozen.min_strip_estimates,
            # the first round already holds the strips an error bar needs
            wanted=min(max(recipe.initial, min_reps), cap),
            goal=recipe.goal is not None,
        )
    if rows is not None and rows.num_rows:
        keys = rows.column("point_key").to_pylist()
        reps = rows.column("replica").to_pylist()
        gams = rows.column("gamma_strips").to_pylist()
        for k, r, g in zip(keys, reps, gams, strict=True):
            if k in by_key:
                by_key[k].done[int(r)] = np.asarray(g, dtype=float)
    for pp in by_key.values():
        pp.decide()
    return by_key


@dataclass
class RunPreview:
    """What ``sweepctl run`` would do on a store, before it submits anything."""

    points: int
    todo_points: int
    new_points: list[str]
    reopened_points: list[str]
    replicas_to_submit: int
    stored_rows: int

    def to_json(self) -> dict:
        return {
            "points": self.points,
            "todo_points": self.todo_points,
            "new_points": len(self.new_points),
            "reopened_points": len(self.reopened_points),
            "replicas_to_submit": self.replicas_to_submit,
            "stored_rows": self.stored_rows,
            "new": self.new_points[:50],
            "reopened": self.reopened_points[:50],
        }


def preview_run(
    recipe: Recipe,
    frozen: Frozen,
    rows: pa.Table,
    previous: tuple[Recipe, Frozen] | None,
) -> tuple[RunPreview, dict[str, PointProgress]]:
    """The first round ``run`` would submit for ``recipe`` on a store holding ``rows``.

    ``previous`` is the store's last recorded recipe with its frozen settings: points
    it had finished that ``recipe`` has not are *reopened* (a tightened target, a
    raised cap), points it did not have are *new*.
    """
    progress = build_progress(recipe, frozen, rows)
    before = build_progress(*previous, rows) if previous is not None else {}
    new = [k for k in progress if k not in before]
    reopened = [
        k for k, pp in progress.items() if k in before and before[k].finished and not pp.finished
    ]
    todo = [pp for pp in progress.values() if not pp.finished]
    return (
        RunPreview(
            points=len(progress),
            todo_points=len(todo),
            new_points=new,
            reopened_points=reopened,
            replicas_to_submit=sum(len(pp.missing()) for pp in todo),
            stored_rows=rows.num_rows,
        ),
        progress,
    )


def replica_price(frozen: Frozen, cost, pp: PointProgress) -> float | None:
    """CPU seconds of one replica of ``pp``'s point: the frozen price (goal campaigns),
    else the cost model's (``cost`` may be None: then None)."""
    v = frozen.price_for(pp.point)
    if v is not None:
        return v
    if cost is None:
        return None
    return float(cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips))


def fit_slice_key(point: Point) -> str:
    """Key of the point's disorder/ε slice: the points one scaling fit (and one goal) covers."""
    return f"pb={point.p_block!r}|po={point.p_open!r}|eps={point.epsilon!r}"


#: the tightest linearised aim, as a fraction of the goal, that a failed check may set
MIN_AIM = 1e-3


class GoalRounds:
    """Campaign-wide rounds of a recipe with a goal (module docstring).

    ``price(pp)`` is the CPU seconds of one replica of ``pp``'s point (the frozen or the
    cost model's price, never a measured time: decisions must not depend on timing);
    ``fitter(data, symmetric)`` the slice fit, a :class:`~sweepctl.fss.fit.Fit` (or None)
    or a pair (fit, alternatives) as
    :func:`~sweepctl.campaign.allocate.fit_slice_branches` returns (the default).

    **The check.** The rounds steer by the linearised half-width of one form; ``sweepctl
    fit`` prints a resampled interval that covers every branch and can be wider. When a
    round finds every slice's linearised half-width within the goal, ``checker(data,
    symmetric)`` (default :func:`~sweepctl.campaign.allocate.check_slice`: the full
    procedure of ``sweepctl fit``) is run on each slice; the goal is met only if each
    budget half-width (:meth:`~sweepctl.fss.procedure.Outcome.nu_budget`) is within it
    too. A slice that fails has its linearised aim tightened — by goal/checked
    half-width, and at least below its current linearised half-width (about twice the
    replicas when ``fit`` finds no form) — and the same round is decided again with
    that aim, so more replicas go where the linearised design says ν's interval shrinks
    most. The aims are a pure
    function of the prefixes, as every other decision. When :data:`~sweepctl.campaign.
    allocate.CHECK_STALLS` failed checks in a row leave the budget no narrower (by
    ``CHECK_NARROWING``), more replicas on the steering form are not shrinking what
    ``fit`` reports (a gap between forms, or no acceptable form): the campaign stops with
    :data:`~sweepctl.campaign.allocate.CHECK_STALLED`.
    """

    def __init__(
        self,
        recipe: Recipe,
        frozen: Frozen,
        price: Callable[[PointProgress], float],
        fitter: Callable | None = None,
        checker: Callable | None = None,
    ) -> None:
        from sweepctl.campaign.allocate import check_slice, fit_slice_branches

        if recipe.goal is None:
            raise ValueError("goal rounds need a recipe with [goal]")
        self.goal = recipe.goal
        self.target = recipe.target
        self.min_estimates = frozen.min_strip_estimates
        self.price = price
        self.fitter = fitter or fit_slice_branches
        self.checker = checker or check_slice
        #: per slice, the linearised aim as a fraction of the goal (1 until a check fails)
        self.aim: dict[str, float] = {}
        #: per slice, the last check (:class:`~sweepctl.campaign.allocate.Check`)
        self.checks: dict = {}
        #: per slice, the budget half-width of the last failed check, and how many failed
        #: checks in a row have not narrowed it (CHECK_STALLS of them stop the campaign)
        self.failed_checks: dict[str, float] = {}
        self.stalls: dict[str, int] = {}
        #: rounds decided so far (round 0 is every point's first round)
        self.round = 0
        #: why the campaign stopped (``allocate``'s reason), or None
        self.reason: str | None = None
        #: rounds decided with every half-width within the goal but alternatives left
        self.separation_rounds = 0

    def advance(self, progress: dict[str, PointProgress]) -> list[dict]:
        """Decide every round whose prefixes are complete; the decisions as events."""
        from sweepctl.campaign.allocate import (
            CHECK_NARROWING,
            CHECK_STALLED,
            CHECK_STALLS,
            GOAL_MET,
            SEPARATION_ROUNDS,
            PointState,
            SliceState,
            allocate,
            slice_data,
        )

        out: list[dict] = []
        while self.reason is None:
            live = sorted(
                (pp for pp in progress.values() if not pp.failed), key=lambda q: q.point.key
            )
            if not live or not all(pp.prefix_complete() for pp in live):
                break
            by_slice: dict[str, list[PointState]] = {}
            for pp in live:
                by_slice.setdefault(fit_slice_key(pp.point), []).append(
                    PointState(
                        point=pp.point,
                        prefix=tuple(pp.done[r] for r in range(pp.wanted)),
                        replica_seconds=float(self.price(pp)),
                        max_replicas=pp.max_replicas,
                    )
                )
            goal = self.goal.nu_halfwidth
            slices = []
            for key, pts in sorted(by_slice.items()):
                symmetric = pts[0].point.p_block == pts[0].point.p_open
                fit, alts = self.fitter(slice_data(pts), symmetric), ()
                if isinstance(fit, tuple):
                    fit, alts = fit
                aim = goal * self.aim.get(key, 1.0)
                slices.append(SliceState(key, tuple(pts), fit, aim, tuple(alts)))
            spent = sum(p.replicas * p.replica_seconds for s in slices for p in s.points)

            def decide(slices, spent=spent):
                return allocate(
                    slices,
                    target=self.target,
                    min_estimates=self.min_estimates,
                    budget_seconds=self.goal.cpu_hours * 3600.0 - spent,
                    separate=self.separation_rounds < SEPARATION_ROUNDS,
                )

            a = decide(slices)
            checked: dict = {}
            if a.reason == GOAL_MET:
                # the linearised goal is met: does `sweepctl fit` agree? (class docstring)
                for s in slices:
                    symmetric = s.points[0].point.p_block == s.points[0].point.p_open
                    checked[s.key] = self.checker(slice_data(s.points), symmetric)
                self.checks.update(checked)
                failed = [s for s in slices if not checked[s.key].halfwidth <= goal]
                for s in failed:
                    # a failed check whose budget did not narrow since the last failed one
                    h, last = checked[s.key].halfwidth, self.failed_checks.get(s.key)
                    narrowed = last is not None and h < CHECK_NARROWING * last
                    stalls = 0 if last is None or narrowed else self.stalls.get(s.key, 0) + 1
                    self.stalls[s.key] = stalls
                    self.failed_checks[s.key] = h
                if any(self.stalls.get(s.key, 0) >= CHECK_STALLS for s in failed):
                    a = dataclasses.replace(a, reason=CHECK_STALLED)
                elif failed:
                    for s in failed:
                        h = checked[s.key].halfwidth
                        now = self.aim.get(s.key, 1.0)
                        lin = a.halfwidth[s.key] / goal
                        # no acceptable form: aim at about twice the replicas (the
                        # half-width scales as 1/√replicas); else by goal / budget
                        tighter = now * goal / h if math.isfinite(h) else 0.7 * lin
                        below = 0.99 * lin
                        aim = min(tighter, below) if math.isfinite(below) else 0.5 * now
                        self.aim[s.key] = max(aim, MIN_AIM)
                    slices = [
                        SliceState(
                            s.key,
                            s.points,
                            s.fit,
                            goal * self.aim.get(s.key, 1.0),
                            s.alternatives,
                        )
                        for s in slices
                    ]
                    a = decide(slices)
            if all(
                s.fit is not None and a.halfwidth[s.key] <= s.nu_halfwidth for s in slices
            ) and any(s.alternatives for s in slices):
                self.separation_rounds += 1
            self.round += 1
            grown = {
                pp.point.key: a.wanted[pp.point.key]
                for pp in live
                if a.wanted[pp.point.key] > pp.wanted
            }
            out.append(
                {
                    "event": "allocation",
                    "round": self.round,
                    "reason": a.reason,
                    "cpu_seconds_spent": spent,
                    "cpu_seconds_round": a.seconds,
                    "forms": {
                        s.key: None if s.fit is None else s.fit.model.describe() for s in slices
                    },
                    "nu": {s.key: None if s.fit is None else s.fit.values()["nu"] for s in slices},
                    # fits whose ν disagrees with the choice's (branches, other forms)
                    "alternatives": {
                        s.key: [
                            {"form": f.model.describe(), "nu": f.values()["nu"]}
                            for f in s.alternatives
                        ]
                        for s in slices
                    },
                    "nu_halfwidth": {k: _finite(v) for k, v in a.halfwidth.items()},
                    "projected_halfwidth": {k: _finite(v) for k, v in a.projected.items()},
                    # the linearised aim of each slice (the goal, or tighter after a check)
                    "aim_halfwidth": {s.key: s.nu_halfwidth for s in slices},
                    # `sweepctl fit`'s interval, where this round checked it
                    "check": {k: c.as_dict() for k, c in checked.items()},
                    "replicas": grown,
                }
            )
            if a.reason is not None:
                self.reason = a.reason
                for pp in progress.values():
                    pp.finished = True
                break
            for pp in live:
                pp.wanted = a.wanted[pp.point.key]
        return out


def _finite(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None


def project_goal(
    recipe: Recipe,
    frozen: Frozen,
    progress: dict[str, PointProgress],
    price: Callable[[PointProgress], float],
    fitter: Callable | None = None,
) -> dict:
    """CPU to reach the goal from the stored rows: the linearised projection.

    Every point's longest complete stored prefix is fitted per slice (the goal rounds'
    fitter) and :func:`~sweepctl.campaign.allocate.allocate` is asked, without the
    round limit, for the replicas that bring each slice's linearised half-width within
    its goal. The projection trusts the fitted form: a later round can refit another
    form, or find branches, and need more. ``projected_cpu_hours`` is None while a slice
    has no stable form (its rounds grow uniformly until one is found).
    """
    from sweepctl.campaign.allocate import (
        PointState,
        SliceState,
        allocate,
        fit_slice_branches,
        slice_data,
    )

    if recipe.goal is None:
        raise ValueError("a projection needs a recipe with [goal]")
    fitter = fitter or fit_slice_branches
    by_slice: dict[str, list[PointState]] = {}
    for pp in sorted(progress.values(), key=lambda q: q.point.key):
        if pp.failed:
            continue
        n = 0
        while n in pp.done:
            n += 1
        by_slice.setdefault(fit_slice_key(pp.point), []).append(
            PointState(
                point=pp.point,
                prefix=tuple(pp.done[r] for r in range(n)),
                replica_seconds=float(price(pp)),
                max_replicas=pp.max_replicas,
            )
        )
    slices, out_slices = [], {}
    for key, pts in sorted(by_slice.items()):
        symmetric = pts[0].point.p_block == pts[0].point.p_open
        fit, alts = None, ()
        if all(p.replicas >= 1 for p in pts):
            fit = fitter(slice_data(pts), symmetric)
            if isinstance(fit, tuple):
                fit, alts = fit
        slices.append(SliceState(key, tuple(pts), fit, recipe.goal.nu_halfwidth, tuple(alts)))
        out_slices[key] = {
            "form": None if fit is None else fit.model.describe(),
            "nu": None if fit is None else fit.values()["nu"],
            "alternatives": len(alts),
        }
    spent = sum(p.replicas * p.replica_seconds for s in slices for p in s.points)
    out = {
        "cpu_hours_spent": spent / 3600.0,
        "projected_cpu_hours": None,
        "slices": out_slices,
    }
    if any(s.fit is None for s in slices):
        return out
    a = allocate(
        slices,
        target=recipe.target,
        min_estimates=frozen.min_strip_estimates,
        budget_seconds=math.inf,
        growth=math.inf,
    )
    for s in slices:
        out_slices[s.key]["halfwidth"] = _finite(a.halfwidth[s.key])
        out_slices[s.key]["projected_halfwidth"] = _finite(a.projected[s.key])
    out["projected_cpu_hours"] = (spent + a.seconds) / 3600.0
    out["reason"] = a.reason
    return out
