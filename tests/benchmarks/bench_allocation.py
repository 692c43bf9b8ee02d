"""Fit-aware allocation against uniform per-point precision: CPU to one ν half-width.

Both strategies run the same slice from the same pilot (``replica.initial`` replicas per
point, the same seeds) until the linearised 95 % half-width of ν of the slice's fit is
within the goal, and are charged what the cost model prices each replica at (the price a
rehearsal row is charged; :mod:`sweepctl.kernel.rehearsal`).

* **uniform**: one relative precision t for every point, each point grown by the
  per-point rule (:func:`sweepctl.campaign.plan.next_target`, as ``run`` without a goal);
  after each level the slice is fitted and t is lowered by the projection
  t·goal/(half-width·√MARGIN) (clipped to [t/2, 0.99 t]), the head-room the goal rounds
  use; while no form can be fitted t falls by √2 (twice the replicas).
* **fit-aware**: the goal rounds of the driver (:class:`sweepctl.campaign.progress.
  GoalRounds` → :func:`sweepctl.campaign.allocate.allocate`), with ``precision.target``
  as a loose floor.

Both use the same *form rule* (how the slice's form is chosen each round):

* ``widest`` (the driver's, :func:`~sweepctl.campaign.allocate.fit_slice_branches`):
  each round, of the stable forms with at most ``SPREAD_EXTRA_PARAMS`` more parameters
  than the fewest-parameter one, the one with the widest linearised ν interval, and the
  alternatives that disagree with it;
* ``fewest``: the scan's stable choice each round (the fewest-parameter stable form),
  no alternatives (the driver's rule before the measurement);
* ``frozen``: the driver's choice of the first round that has one, then that form and
  N_min for the rest of the campaign.

Both stop only when the goal check passes as well (:class:`sweepctl.campaign.progress.
GoalRounds`: ``sweepctl fit``'s own budget, ``nu_budget``, within the goal); a uniform run
still short of it at ``CENSOR_HOURS`` (the fit-aware recipe's budget) is stopped and
marked censored. Uniform, like the driver, stops separating alternatives after
``SEPARATION_ROUNDS`` levels with the half-width within the goal.

Coverage: the fraction of seeds whose final ``sweepctl fit`` interval (the check's
budget: the resampled headline interval, every branch, the nearby stable forms) holds
the law's ν; a run that ends without
an acceptable form does not cover. Its binomial standard error is printed beside it.

Part 1 simulates in process on the rehearsal model (the worker's own draw, the same
seeds and prices as a campaign; no Dask). Part 2 runs ``sweepctl run`` on the network
kernel at small widths, a few seeds, both strategies (uniform: ``run`` again with a
tightened ``precision.target`` on the same store), and reports ν against [P1]
tests/REFERENCES.md (ν = 2.593; small widths have corrections, so coverage there says
more about the form than about the allocation).

Run: ``python tests/benchmarks/bench_allocation.py [--seeds 50] [--rules widest]
[--seed-offset 0] [--goal 0.05] [--processes 2] [--skip-network] [--network-seeds 3]``.
Seeds used to choose a form rule must not be those reported: measure the rules with
``--seed-offset 1000`` and report with the default offset.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from sweepctl.campaign.allocate import (
    GOAL_MET,
    MARGIN,
    SEPARATION_ROUNDS,
    PointState,
    SliceDesign,
    SliceState,
    check_slice,
    fit_slice,
    fit_slice_branches,
    slice_data,
)
from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.plan import freeze, next_target, replica_seed
from sweepctl.campaign.progress import GoalRounds, build_progress, fit_slice_key
from sweepctl.campaign.recipe import parse_recipe
from sweepctl.campaign.store import Store
from sweepctl.campaign.summary import store_recipe
from sweepctl.fss.fit import Fit, FitError, ScalingData, explore
from sweepctl.fss.procedure import (
    DEFAULT_MAX_ORDERS,
    admissible,
    stable_forms,
)
from sweepctl.fss.scan import determines_nu

#: the rehearsal law: even in ρ like the clean network, with the ρ⁴ term the fewest-
#: parameter forms lack (the law of recipes/rehearsal.toml without its correction)
LAW = {"kind": "rehearsal", "nu": 2.6, "Gamma_c": 0.8, "F": [0.0, 0.85, 0.0, 0.02]}
WIDTHS = [8, 16, 32, 64]
COUPLINGS = [round(float(x), 12) for x in np.linspace(-0.2, 0.2, 9)]
REPLICA = {"layers": 2000, "warmup": 64, "strips": 16, "initial": 4}
#: a loose floor: 4 replicas of 16 strips (the 51 strip values an error bar needs) meet it
FLOOR = 0.2
ENTROPY0 = 0xA110C_BE4C_0000
#: either run still short of the goal is stopped here (censored: its CPU a lower bound);
#: for fit-aware it is the recipe's [goal] cpu_hours
CENSOR_HOURS = 200.0


def recipe_dict(entropy: int, goal: float, *, target: float = FLOOR, with_goal: bool = True):
    d = {
        "campaign": {"name": "alloc-bench", "entropy": entropy},
        "axes": {"widths": WIDTHS, "couplings": COUPLINGS},
        "precision": {"target": target, "max_layers": REPLICA["layers"] * 100_000},
        "replica": dict(REPLICA),
        "model": dict(LAW),
    }
    if with_goal:
        d["goal"] = {"nu_halfwidth": goal, "cpu_hours": CENSOR_HOURS}
    return d


# -- form rules ------------------------------------------------------------------------


def _acceptable(f: Fit) -> bool:
    """What the driver's fitter accepts: admissible (p ≥ 0.1, no bound, not ruled out by
    leading-order dominance) and determining ν."""
    return admissible(f) and determines_nu(f)


class WidestRule:
    """What the driver does (:func:`~sweepctl.campaign.allocate.fit_slice_branches`): of
    the stable forms near the fewest-parameter one, the widest ν interval, with the
    alternatives that disagree with it."""

    name = "widest"

    def __call__(self, data: ScalingData, symmetric: bool):
        return fit_slice_branches(data, symmetric)


class FewestRule:
    """The scan's stable choice alone (the fewest-parameter stable form), no
    alternatives: the rule before the form-rule measurement."""

    name = "fewest"

    def __call__(self, data: ScalingData, symmetric: bool) -> Fit | None:
        if len(data.widths()) < 2:
            return None
        for r in stable_forms(data, symmetric, DEFAULT_MAX_ORDERS):
            ok = [f for f in (r.minima or [r.fit]) if _acceptable(f)]
            if ok:
                return ok[0]
        return None


class FrozenRule:
    """The driver's first choice, then that form and N_min only."""

    name = "frozen"

    def __init__(self) -> None:
        self.form = None

    def __call__(self, data: ScalingData, symmetric: bool) -> Fit | None:
        if self.form is None:
            f = fit_slice(data, symmetric)
            if f is not None:
                self.form = (f.model, f.n_min)
            return f
        model, n_min = self.form
        try:
            minima = explore(data, model, n_min=n_min)
        except FitError:
            return None
        ok = [f for f in minima if _acceptable(f)]
        return (ok or minima)[0]


RULES = {"widest": WidestRule, "fewest": FewestRule, "frozen": FrozenRule}


# -- the two strategies in process -----------------------------------------------------


@dataclass
class Outcome:
    strategy: str
    seed: int
    cpu_seconds: float
    nu: float
    sigma: float
    halfwidth: float
    rounds: int
    form: str
    reason: str

    #: the interval ``sweepctl fit`` prints at the end (the goal check's, :func:`~sweepctl.
    #: campaign.allocate.check_slice`); NaN when it finds no acceptable form
    lo: float = math.nan
    hi: float = math.nan

    def covers(self, nu: float) -> bool:
        """The final `sweepctl fit` interval holds ``nu`` (no interval: not covered)."""
        return bool(self.lo <= nu <= self.hi)


def _draw(frozen, model, point, r: int) -> np.ndarray:
    # the worker's draw (sweepctl.campaign.worker._rehearse): same seed, same law
    seed = replica_seed(frozen.entropy, point, r)
    return model.strip_gammas(point.width, point.x, frozen.layers_for(point), frozen.strips, seed)


def _slice_states(progress, price) -> list[PointState]:
    return [
        PointState(pp.point, tuple(pp.done[r] for r in range(pp.wanted)), price(pp), 10**9)
        for pp in sorted(progress.values(), key=lambda q: q.point.key)
    ]


def fit_aware(seed: int, goal: float, rule: str, cost: CostModel) -> Outcome:
    recipe = parse_recipe(recipe_dict(ENTROPY0 + seed, goal))
    frozen = freeze(recipe, cost)
    model = frozen.rehearsal()

    def price(pp) -> float:
        return cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips)

    fitter = RULES[rule]()
    last: dict = {}

    def keep(data, symmetric):
        f = fitter(data, symmetric)
        last["fit"] = f[0] if isinstance(f, tuple) else f
        return f

    progress = build_progress(recipe, frozen, None)
    rounds = GoalRounds(recipe, frozen, price, keep)
    decisions: list[dict] = []
    while rounds.reason is None:
        for pp in progress.values():
            for r in pp.missing():
                pp.done[r] = _draw(frozen, model, pp.point, r)
        decisions += rounds.advance(progress)
    cpu = sum(price(pp) * len(pp.done) for pp in progress.values())
    f = last["fit"]
    key = fit_slice_key(next(iter(progress.values())).point)
    c = rounds.checks.get(key) if rounds.reason == GOAL_MET else None
    if c is None:  # stopped otherwise: what `sweepctl fit` says of the final data
        pts = _slice_states(progress, price)
        c = check_slice(slice_data(pts), True)
    return Outcome(
        "fit-aware",
        seed,
        cpu,
        c.nu,
        math.nan if f is None else f.linear_error("nu"),
        c.halfwidth,
        rounds.round,
        "no fit" if f is None else f.model.orders.label() + f" N_min={f.n_min}",
        rounds.reason,
        c.lo,
        c.hi,
    )


def uniform(seed: int, goal: float, rule: str, cost: CostModel) -> Outcome:
    recipe = parse_recipe(recipe_dict(ENTROPY0 + seed, goal, with_goal=False))
    frozen = freeze(recipe, cost)
    model = frozen.rehearsal()

    def price(pp) -> float:
        return cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips)

    fitter = RULES[rule]()
    progress = build_progress(recipe, frozen, None)
    for pp in progress.values():  # the pilot, as the goal campaign's first round
        pp.finished = False
        pp.wanted = REPLICA["initial"]
        for r in range(pp.wanted):
            pp.done[r] = _draw(frozen, model, pp.point, r)
    t = max(pp.rel_err() for pp in progress.values())
    rounds = separating = 0
    while True:
        rounds += 1
        pts = _slice_states(progress, price)
        symmetric = pts[0].point.p_block == pts[0].point.p_open
        f, alts = _pair(fitter(slice_data(pts), symmetric))
        hw = math.inf
        if f is not None:
            d = SliceDesign(SliceState("s", tuple(pts), f, goal, alts))
            hw = d.halfwidth()
            # as for the goal rounds: the goal needs every alternative separated, and
            # then `sweepctl fit`'s own interval within it (the goal check)
            if hw <= goal and d.unseparated().any() and separating < SEPARATION_ROUNDS:
                separating += 1  # as the driver: a few levels for the alternatives
                t /= math.sqrt(2.0)
            elif hw <= goal:
                check = check_slice(slice_data(pts), symmetric)
                if check.halfwidth <= goal:
                    reason = "goal met"
                    break
                h = check.halfwidth if math.isfinite(check.halfwidth) else 2 * goal
                t *= min(max(goal / (h * math.sqrt(MARGIN)), 0.5), 0.99)
            else:
                t *= min(max(goal / (hw * math.sqrt(MARGIN)), 0.5), 0.99)
        else:
            t /= math.sqrt(2.0)
        for pp in progress.values():  # the per-point rule at target t
            while True:
                prefix = [pp.done[r] for r in range(pp.wanted)]
                want = next_target(prefix, t, 10**9, frozen.min_strip_estimates)
                if want <= pp.wanted:
                    break
                for r in range(pp.wanted, want):
                    pp.done[r] = _draw(frozen, model, pp.point, r)
                pp.wanted = want
        cpu = sum(price(pp) * len(pp.done) for pp in progress.values())
        if rounds > 40 or cpu > CENSOR_HOURS * 3600.0:
            # censored: its CPU is a lower bound; its interval what `fit` says now
            pts = _slice_states(progress, price)
            check = check_slice(slice_data(pts), symmetric)
            reason = "censored"
            break
    cpu = sum(price(pp) * len(pp.done) for pp in progress.values())
    return Outcome(
        "uniform",
        seed,
        cpu,
        check.nu,
        math.nan if f is None else f.linear_error("nu"),
        check.halfwidth,
        rounds,
        "no fit" if f is None else f.model.orders.label() + f" N_min={f.n_min}",
        reason,
        check.lo,
        check.hi,
    )


def _pair(f) -> tuple[Fit | None, tuple[Fit, ...]]:
    return (f[0], tuple(f[1])) if isinstance(f, tuple) else (f, ())


def _one(job):
    strategy, seed, goal, rule, cal = job
    cost = CostModel(cal)
    fn = fit_aware if strategy == "fit-aware" else uniform
    return fn(seed, goal, rule, cost)


def rehearsal_table(seeds, goal, rules, cal, processes) -> dict:
    jobs = [
        (s, seed, goal, rule, cal)
        for rule in rules
        for seed in seeds
        for s in ("uniform", "fit-aware")
    ]
    results = []
    with ProcessPoolExecutor(processes) as ex:
        for job, r in zip(jobs, ex.map(_one, jobs), strict=True):
            # one line per run as it ends (a long benchmark can be cut)
            print(
                f"  {job[3]:7} {r.strategy:9} seed {r.seed:5}: {r.cpu_seconds / 3600:.4f} CPU-h, "
                f"fit: nu = {r.nu:.4f} [{r.lo:.4f}, {r.hi:.4f}], {r.rounds} rounds, "
                f"{r.form}, {r.reason}",
                flush=True,
            )
            results.append(r)
    rule_of = {id(r): job[3] for r, job in zip(results, jobs, strict=True)}
    out: dict = {}
    nu = LAW["nu"]
    print(
        f"\nrehearsal law: nu = {nu}, widths {WIDTHS}, {len(COUPLINGS)} couplings in "
        f"[{COUPLINGS[0]}, {COUPLINGS[-1]}], goal half-width {goal}, {len(seeds)} seeds "
        f"({seeds[0]}..{seeds[-1]})"
    )
    hdr = (
        f"{'rule':8} {'strategy':10} {'CPU-h median':>12} {'CPU-h mean':>11} "
        f"{'coverage':>14} {'mean nu':>8} {'rounds':>6}  ratio uniform/fit-aware"
    )
    print(hdr)
    for rule in rules:
        by = {
            s: [r for r in results if r.strategy == s and rule_of[id(r)] == rule]
            for s in ("uniform", "fit-aware")
        }
        rows = {}
        for s, rs in by.items():
            cpu = np.array([r.cpu_seconds for r in rs]) / 3600.0
            cov = np.mean([r.covers(nu) for r in rs])
            se = math.sqrt(cov * (1 - cov) / len(rs))
            rows[s] = {
                "cpu_hours_median": float(np.median(cpu)),
                "cpu_hours_mean": float(np.mean(cpu)),
                "coverage": float(cov),
                "coverage_se": se,
                "nu_mean": float(np.nanmean([r.nu for r in rs])),
                "rounds_mean": float(np.mean([r.rounds for r in rs])),
                "forms": _count(r.form for r in rs),
                "reasons": _count(r.reason for r in rs),
            }
        pairs = list(zip(by["uniform"], by["fit-aware"], strict=True))
        ratios = np.array([u.cpu_seconds / a.cpu_seconds for u, a in pairs])
        # seeds where both met the goal: their ratio is exact (a censored run's is a bound)
        met = np.array([u.reason == a.reason == GOAL_MET for u, a in pairs])
        for s in ("uniform", "fit-aware"):
            r = rows[s]
            tail = ""
            if s == "fit-aware":
                tail = (
                    f"  median {np.median(ratios):.2f}, of means "
                    f"{rows['uniform']['cpu_hours_mean'] / r['cpu_hours_mean']:.2f}"
                )
            print(
                f"{rule:8} {s:10} {r['cpu_hours_median']:12.4f} {r['cpu_hours_mean']:11.4f} "
                f"{r['coverage']:8.2f} ± {r['coverage_se']:.2f} {r['nu_mean']:8.3f} "
                f"{r['rounds_mean']:6.1f}{tail}"
            )
        for s in ("uniform", "fit-aware"):
            print(f"{'':8} {s:10} forms {rows[s]['forms']}  stops {rows[s]['reasons']}")
        if met.any():
            print(
                f"{'':8} ratio where both met the goal ({int(met.sum())} of {met.size} seeds): "
                f"median {np.median(ratios[met]):.2f}, smallest {np.min(ratios[met]):.2f}"
            )
        out[rule] = rows | {
            "ratio_median": float(np.median(ratios)),
            "ratio_median_both_met": float(np.median(ratios[met])) if met.any() else None,
            "ratio_min_both_met": float(np.min(ratios[met])) if met.any() else None,
            "both_met": int(met.sum()),
        }
    return out


def _count(items) -> dict:
    out: dict = {}
    for i in items:
        out[i] = out.get(i, 0) + 1
    return dict(sorted(out.items(), key=lambda kv: -kv[1]))


# -- part 2: the network kernel through `sweepctl run` ---------------------------------

NET_WIDTHS = [4, 6, 8, 10]
NET_COUPLINGS = [-0.3, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3]
NET_REPLICA = {"layers": 4000, "warmup": 32, "strips": 8, "initial": 7}
NU_REFERENCE = 2.593  # [P1] tests/REFERENCES.md
#: CPU-hours a network goal run may spend (its [goal] cpu_hours)
NET_BUDGET = 0.5


def _toml(d: dict) -> str:
    lines = []
    for table, body in d.items():
        lines.append(f"[{table}]")
        for k, v in body.items():
            lines.append(f"{k} = {json.dumps(v)}")
    return "\n".join(lines) + "\n"


def _sweepctl(*args) -> subprocess.CompletedProcess:
    proc = subprocess.run(
        [sys.executable, "-m", "sweepctl", *map(str, args)], capture_output=True, text=True
    )
    if proc.returncode not in (0, 3):
        raise RuntimeError(f"sweepctl {' '.join(map(str, args))}: {proc.stdout}{proc.stderr}")
    return proc


def _store_fit(store: Path, goal: float, rule: str, cal: list[dict]):
    """The slice's fit on the stored rows, as the goal rounds see it."""
    st = Store(store)
    rows = st.read_replicas()
    _, recipe, frozen = store_recipe(st)
    cost = CostModel(cal)
    prog = build_progress(recipe, frozen, rows)
    for pp in prog.values():
        pp.wanted = len(pp.done)

    def price(pp) -> float:
        return cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips)

    pts = _slice_states(prog, price)
    f, _ = _pair(RULES[rule]()(slice_data(pts), True))
    hw = math.inf if f is None else SliceDesign(SliceState("s", tuple(pts), f, goal)).halfwidth()
    cpu = float(np.sum(rows.column("cpu_seconds").to_numpy()))
    # what `sweepctl fit` prints for the store (the goal check): coverage is judged on it
    check = check_slice(slice_data(pts), True)
    return f, hw, cpu, check


def network_table(seeds, goal, rule, cal_path: Path, cal, censor: float = 10.0) -> list:
    """Both strategies per seed through ``sweepctl run``; the uniform run is stopped
    (censored: its CPU is then a lower bound) once it has spent ``censor`` times the
    fit-aware run's CPU without reaching the goal."""
    out = []
    for seed in seeds:
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            base = {
                "campaign": {"name": "alloc-bench-net", "entropy": ENTROPY0 + 7919 * (seed + 1)},
                "axes": {"widths": NET_WIDTHS, "couplings": NET_COUPLINGS},
                "precision": {"target": 0.5, "max_layers": NET_REPLICA["layers"] * 10_000},
                "replica": dict(NET_REPLICA),
            }
            rec = tmp / "goal.toml"
            rec.write_text(_toml(base | {"goal": {"nu_halfwidth": goal, "cpu_hours": NET_BUDGET}}))
            t0 = time.time()
            _sweepctl("run", rec, tmp / "fa", "--workers", "2", "--calibration", cal_path)
            f, hw, cpu, c = _store_fit(tmp / "fa", goal, rule, cal)
            stops = [e for e in Store(tmp / "fa").read_events() if e.get("event") == "allocation"]
            reason = stops[-1]["reason"] if stops else None
            fa_censored = reason != GOAL_MET  # stopped by its budget, or otherwise
            out.append(("fit-aware", seed, cpu, f, hw, time.time() - t0, fa_censored, c))
            print(
                f"  seed {seed} fit-aware: {cpu / 3600:.4f} CPU-h, {_said(f, hw, c)} ({reason})",
                flush=True,
            )
            # uniform: the same store tightened level by level (the pilot is shared)
            t, t0, censored = None, time.time(), False
            for _ in range(30):
                r = base | {"precision": base["precision"] | {"target": t or 0.5}}
                rec = tmp / "uniform.toml"
                rec.write_text(_toml(r))
                _sweepctl("run", rec, tmp / "un", "--workers", "2", "--calibration", cal_path)
                fu, hwu, cpuu, cu = _store_fit(tmp / "un", goal, rule, cal)
                if fu is not None and hwu <= goal and cu is not None and cu.halfwidth <= goal:
                    break
                if cpuu > censor * cpu:
                    censored = True
                    break
                if t is None:
                    t = _max_rel_err(tmp / "un")
                if fu is None:
                    t /= math.sqrt(2.0)
                else:
                    h = hwu if cu is None else max(hwu, cu.halfwidth)
                    h = h if math.isfinite(h) else 2 * goal
                    t *= min(max(goal / (h * math.sqrt(MARGIN)), 0.5), 0.99)
            else:  # thirty levels without the goal
                censored = True
            out.append(("uniform", seed, cpuu, fu, hwu, time.time() - t0, censored, cu))
            print(
                f"  seed {seed} uniform:   {'≥ ' if censored else ''}{cpuu / 3600:.4f} CPU-h, "
                + _said(fu, hwu, cu)
                + (" (stopped short of the goal: censored)" if censored else ""),
                flush=True,
            )
    return out


def _said(f, hw: float, c) -> str:
    if f is None:
        return "no fit"
    text = f"nu = {f.values()['nu']:.3f} ± {hw:.3f} (linearised)"
    if c is not None:
        text += f", sweepctl fit: [{c.lo:.3f}, {c.hi:.3f}]"
    return text


def _max_rel_err(store: Path) -> float:
    st = Store(store)
    _, recipe, frozen = store_recipe(st)
    prog = build_progress(recipe, frozen, st.read_replicas())
    return max(pp.rel_err() for pp in prog.values())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=50)
    ap.add_argument("--seed-offset", type=int, default=0)
    ap.add_argument("--goal", type=float, default=0.05)
    ap.add_argument("--rules", default="widest", help="comma-separated: widest,fewest,frozen")
    ap.add_argument("--processes", type=int, default=2)
    ap.add_argument(
        "--calibration",
        type=Path,
        help="sweepctl bench --out FILE (default: measured now at the benchmark's widths)",
    )
    ap.add_argument("--skip-rehearsal", action="store_true")
    ap.add_argument("--skip-network", action="store_true")
    ap.add_argument("--network-seeds", type=int, default=3)
    ap.add_argument("--network-goal", type=float, default=0.08)
    ap.add_argument(
        "--network-censor",
        type=float,
        default=10.0,
        help="stop a uniform network run at this multiple of the fit-aware CPU",
    )
    ap.add_argument("--json", type=Path, help="write the tables here as JSON")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        cal_path = args.calibration
        if cal_path is None:
            cal_path = Path(tmp) / "cal.json"
            widths = ",".join(str(n) for n in sorted({*WIDTHS, *NET_WIDTHS}))
            _sweepctl("bench", "--widths", widths, "--seconds", "0.5", "--out", cal_path)
        cal = json.loads(Path(cal_path).read_text())["widths"]
        result: dict = {"calibration": str(args.calibration or "measured")}
        t0 = time.time()
        if not args.skip_rehearsal:
            seeds = list(range(args.seed_offset, args.seed_offset + args.seeds))
            rules = args.rules.split(",")
            result["rehearsal"] = rehearsal_table(seeds, args.goal, rules, cal, args.processes)
            print(f"(rehearsal part: {time.time() - t0:.0f} s)")
        if not args.skip_network:
            print(
                f"\nnetwork kernel: widths {NET_WIDTHS}, couplings {NET_COUPLINGS}, "
                f"goal half-width {args.network_goal}, nu reference {NU_REFERENCE} [P1]"
            )
            seeds = list(range(args.seed_offset, args.seed_offset + args.network_seeds))
            rows = network_table(
                seeds, args.network_goal, "widest", Path(cal_path), cal, args.network_censor
            )
            result["network"] = [
                {
                    "strategy": s,
                    "seed": sd,
                    "cpu_hours": c / 3600,
                    "nu": None if f is None else f.values()["nu"],
                    "halfwidth": hw,
                    "form": None if f is None else f.model.describe(),
                    "fit_interval": None if chk is None else [chk.lo, chk.hi],
                    "covers_reference": chk is not None and chk.lo <= NU_REFERENCE <= chk.hi,
                    "wall_seconds": w,
                    "censored": cens,
                }
                for s, sd, c, f, hw, w, cens, chk in rows
            ]
            for s in ("uniform", "fit-aware"):
                rs = [r for r in result["network"] if r["strategy"] == s]
                print(
                    f"{s:10} CPU-h mean {np.mean([r['cpu_hours'] for r in rs]):.4f}  "
                    f"coverage of {NU_REFERENCE}: "
                    f"{sum(r['covers_reference'] for r in rs)}/{len(rs)}"
                    + f", {sum(r['censored'] for r in rs)} censored"
                )
        if args.json:
            args.json.write_text(json.dumps(result, indent=1, default=str))


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    main()
