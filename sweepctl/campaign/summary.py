"""Per-point tables from a store: ``merge`` (results) and ``status`` (progress)."""

from __future__ import annotations

import math
from datetime import UTC, datetime

import numpy as np
import pandas as pd

from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.plan import Frozen
from sweepctl.campaign.progress import GoalRounds, build_progress, project_goal, replica_price
from sweepctl.campaign.recipe import Recipe
from sweepctl.campaign.store import Store

__all__ = [
    "MERGED_COLUMNS",
    "compact_store",
    "driver_state",
    "merge_table",
    "observed_eta",
    "status_rows",
    "store_recipe",
]

MERGED_COLUMNS = [
    "p_block",
    "p_open",
    "epsilon",
    "N",
    "x",
    "Gamma",
    "Gamma_err",
    "n_strips",
    "replicas",
    "layers",
    "cpu_hours",
    "reached_target",
]
_SORT = ["p_block", "p_open", "epsilon", "N", "x"]


def store_recipe(store: Store) -> tuple[dict, Recipe, Frozen]:
    """The campaign record, its latest recipe and frozen settings."""
    store.require()
    campaign = store.read_campaign()
    recipe = Recipe.from_canonical(campaign["recipe_history"][-1]["recipe"])
    return campaign, recipe, Frozen.from_json(campaign["frozen"])


def merge_table(store: Store) -> pd.DataFrame:
    """One row per point with Γ, its standard error over all strips of all replicas.

    ``n_strips`` is the number of independent strip values behind ``Gamma_err`` (the
    fit uses it: an error bar from few strips is itself uncertain).
    """
    campaign, _, _ = store_recipe(store)
    target = float(campaign["target"])
    cols = [
        "point_key",
        "p_block",
        "p_open",
        "epsilon",
        "width",
        "x",
        "replica",
        "gamma_strips",
        "layers",
        "cpu_seconds",
    ]
    t = store.read_replicas(columns=cols)
    if t.num_rows == 0:
        return pd.DataFrame(columns=MERGED_COLUMNS)
    df = t.to_pandas()
    df = df.sort_values(["point_key", "replica"], kind="stable")
    out = []
    for _, g in df.groupby("point_key", sort=False):
        gam = np.concatenate(g["gamma_strips"].to_numpy())
        mean = float(np.mean(gam))
        err = float(np.std(gam, ddof=1) / math.sqrt(gam.size)) if gam.size > 1 else math.nan
        first = g.iloc[0]
        out.append(
            {
                "p_block": float(first.p_block),
                "p_open": float(first.p_open),
                "epsilon": float(first.epsilon),
                "N": int(first.width),
                "x": float(first.x),
                "Gamma": mean,
                "Gamma_err": err,
                "n_strips": int(gam.size),
                "replicas": len(g),
                "layers": int(g["layers"].sum()),
                "cpu_hours": float(g["cpu_seconds"].sum()) / 3600.0,
                "reached_target": bool(err / abs(mean) <= target) if mean else False,
            }
        )
    res = pd.DataFrame(out, columns=MERGED_COLUMNS)
    return res.sort_values(_SORT, kind="stable").reset_index(drop=True)


def driver_state(store: Store) -> dict:
    """Whether a driver holds the store's lease now, and who held it last.

    ``state``: ``running`` (a lease renewed within its expiry), ``stopped`` (released
    by a clean exit), ``lost`` (expired, or its process is gone: the driver died
    without a clean-up; any driver may take over), ``never`` (no driver ever ran).
    """
    st = store.lease_state()
    if st is None:
        return {"state": "never"}
    state = "stopped" if st.released else ("lost" if st.free() else "running")
    out = {"state": state, **st.to_json()}
    if state != "running":  # a countdown only means something for a live lease
        out.pop("expires_in_seconds")
    return out


def _work(point, layers: int, warmup: int, strips: int, cost: CostModel | None) -> float:
    """One replica's work in comparable units: the cost model's CPU seconds, or without
    a model strip-layers × N² (one layer updates a 2N × N frame)."""
    if cost is not None:
        return cost.replica_seconds(point, layers, warmup, strips)
    return float((layers + warmup) * strips * point.width**2)


def observed_eta(store: Store, progress, frozen: Frozen, cost: CostModel | None) -> dict:
    """Wall-clock seconds left for the current rounds at the throughput observed.

    Throughput = the work of the replicas finished since the last run started, over the
    wall time from that start to the last of them (all stored replicas, from the first
    start to the last finish, if the last run has not finished two yet). This is what the
    cluster actually delivered, whatever the workers' number or speed.
    """
    cols = ["point_key", "layers", "warmup", "strips", "started", "finished"]
    t = store.read_replicas(columns=cols)
    if t.num_rows == 0:
        return {"eta_seconds": None, "throughput_basis": "no replica stored yet"}
    df = t.to_pandas()
    pts = {pp.point.key: pp.point for pp in progress.values()}
    df = df[df["point_key"].isin(pts)]
    if df.empty:
        return {"eta_seconds": None, "throughput_basis": "no replica of the recipe's points"}
    df = df.assign(
        work=[
            _work(pts[k], int(a), int(b), int(c), cost)
            for k, a, b, c in zip(df.point_key, df.layers, df.warmup, df.strips, strict=True)
        ]
    )
    start = store.last_event_time("run-start")
    recent = df[df["finished"] >= start] if start is not None else df.iloc[0:0]
    if len(recent) >= 2:
        span = (recent["finished"].max() - start).total_seconds()
        basis = f"{len(recent)} replicas since the last run started"
        used = recent
    else:
        span = (df["finished"].max() - df["started"].min()).total_seconds()
        basis = f"all {len(df)} stored replicas"
        used = df
    left = sum(
        len(pp.missing()) * _work(pp.point, pp.layers, pp.warmup, frozen.strips, cost)
        for pp in progress.values()
        if not pp.finished
    )
    if span <= 0:
        return {"eta_seconds": None, "throughput_basis": basis}
    rate = float(used["work"].sum()) / span
    return {"eta_seconds": left / rate if rate > 0 else None, "throughput_basis": basis}


def status_rows(store: Store, cost: CostModel | None) -> tuple[list[dict], dict]:
    """Per-point progress and totals (with the driver's lease, the last event and an
    ETA from observed throughput).

    A point with stored rows is ``running`` only while a driver holds the lease;
    otherwise it is ``partial`` (rows stored, more to compute, nobody computing).
    """
    campaign, recipe, frozen = store_recipe(store)
    rows = store.read_replicas(columns=["point_key", "replica", "gamma_strips"])
    progress = build_progress(recipe, frozen, rows)
    goal = _goal_state(recipe, frozen, progress, cost)
    driver = driver_state(store)
    live = driver["state"] == "running"
    out = []
    remaining = 0.0
    unpriced = 0  # points with replicas left but no calibration to price them
    for pp in sorted(progress.values(), key=lambda q: q.point):
        g = np.concatenate([pp.done[r] for r in sorted(pp.done)]) if pp.done else np.array([])
        mean = float(np.mean(g)) if g.size else math.nan
        rel = pp.rel_err()
        missing = max(0, pp.wanted - len(pp.done))
        if missing == 0:
            secs = 0.0  # nothing left to price, with or without a calibration
        elif cost is not None:
            secs = missing * cost.replica_seconds(pp.point, pp.layers, pp.warmup, frozen.strips)
        else:
            secs = math.nan
        unpriced += math.isnan(secs)
        remaining += 0.0 if math.isnan(secs) else secs
        state = (
            "done"
            if pp.finished and pp.reached
            else (
                "capped"
                if pp.capped
                else ("pending" if not pp.done else ("running" if live else "partial"))
            )
        )
        out.append(
            {
                "point": pp.point.key,
                "N": pp.point.width,
                "x": pp.point.x,
                "p_block": pp.point.p_block,
                "p_open": pp.point.p_open,
                "epsilon": pp.point.epsilon,
                "replicas": len(pp.done),
                "planned": pp.wanted,
                "max_replicas": pp.max_replicas,
                "Gamma": mean,
                "rel_err": rel,
                "target": recipe.target,
                "state": state,
                "remaining_cpu_hours": secs / 3600.0 if not math.isnan(secs) else None,
            }
        )
    totals = {
        "campaign": campaign["name"],
        "points": len(out),
        "done": sum(r["state"] == "done" for r in out),
        "capped": sum(r["state"] == "capped" for r in out),
        "running": sum(r["state"] == "running" for r in out),
        "partial": sum(r["state"] == "partial" for r in out),
        "pending": sum(r["state"] == "pending" for r in out),
        "replicas": sum(r["replicas"] for r in out),
        "remaining_cpu_hours": remaining / 3600.0 if not unpriced else None,
        "note": "remaining cost counts the current round; a point may need further rounds",
        "driver": driver,
        "last_event": store.last_event(),
        **observed_eta(store, progress, frozen, cost),
    }
    if goal is not None:
        totals["goal"] = goal
    return out, totals


def _goal_state(recipe, frozen, progress, cost: CostModel | None) -> dict | None:
    """With a goal: the campaign's rounds replayed (as the driver decides them) and the
    last decision's ν ± linearised half-width per slice; None without a goal."""
    if recipe.goal is None:
        return None
    out = {
        "nu_halfwidth": recipe.goal.nu_halfwidth,
        "cpu_hours": recipe.goal.cpu_hours,
        "round": None,
        "reason": None,
        "cpu_hours_spent": None,
        "slices": {},
    }
    live = [pp for pp in progress.values() if not pp.failed]
    if any(replica_price(frozen, cost, pp) is None for pp in live):
        out["note"] = "the rounds are replayed with the cost model: give --calibration FILE"
        return out
    rounds = GoalRounds(recipe, frozen, lambda pp: replica_price(frozen, cost, pp))
    decided = rounds.advance(progress)
    out["round"], out["reason"] = rounds.round, rounds.reason
    # what the rounds still need, projected from the stored prefixes (none once stopped)
    out["projected_cpu_hours"] = None
    if rounds.reason is None:
        out["projected_cpu_hours"] = project_goal(
            recipe, frozen, progress, lambda pp: replica_price(frozen, cost, pp)
        )["projected_cpu_hours"]
    if decided:
        last = decided[-1]
        out["cpu_hours_spent"] = last["cpu_seconds_spent"] / 3600.0
        out["slices"] = {
            k: {
                "form": last["forms"][k],
                "nu": last["nu"][k],
                "halfwidth": last["nu_halfwidth"][k],
                # `sweepctl fit`'s interval where a round checked it (GoalRounds)
                "check": rounds.checks[k].as_dict() if k in rounds.checks else None,
            }
            for k in last["nu"]
        }
    return out


def compact_store(store: Store, wait: float = 0.0) -> dict:
    """``sweepctl compact``: under the lease, finish interrupted compactions, merge the
    small part files, and remove checkpoints of replicas whose rows are stored."""
    _, recipe, _ = store_recipe(store)
    before = len(store.part_files())
    with store.locked(wait=wait):
        store.cleanup()
        rows = store.read_replicas(columns=["point_key", "replica"])
        short = {p.key: p.short for p in recipe.points()}
        stored = {
            (short[k], int(r))
            for k, r in zip(
                rows.column("point_key").to_pylist(),
                rows.column("replica").to_pylist(),
                strict=True,
            )
            if k in short
        }
        removed = store.remove_stored_checkpoints(stored)
        read, written = store.compact()
        store.append_events(
            [
                {
                    "time": datetime.now(UTC).isoformat(timespec="milliseconds"),
                    "event": "compacted",
                    "files_read": read,
                    "files_written": written,
                    "removed_checkpoints": removed,
                }
            ]
        )
    return {
        "files_before": before,
        "files_after": len(store.part_files()),
        "files_read": read,
        "files_written": written,
        "removed_checkpoints": removed,
    }
