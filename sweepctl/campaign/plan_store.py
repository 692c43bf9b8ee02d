"""``plan --store``: what ``run`` would do on an existing store, without writing to it."""

from __future__ import annotations

from pathlib import Path

from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.driver import prepare_campaign
from sweepctl.campaign.plan import Frozen
from sweepctl.campaign.progress import RunPreview, preview_run
from sweepctl.campaign.recipe import Recipe
from sweepctl.campaign.store import Store

__all__ = ["goal_plan", "preview_on_store"]


def preview_on_store(
    recipe: Recipe, store_dir: str | Path, source: str, cost: CostModel | None
) -> tuple[Frozen | None, RunPreview]:
    """Frozen settings and first-round preview of ``recipe`` on ``store_dir``.

    The checks and the replay are the driver's own (:func:`prepare_campaign`,
    :func:`preview_run`), so a refused change gives ``run``'s message and the preview
    is what ``run`` submits first. A directory that is not yet a store previews a new
    campaign.
    """
    store = Store(store_dir)
    if not store.exists():
        if store.root.exists() and store.foreign_entries():
            store.require()
    prep = prepare_campaign(recipe, store, source, cost)
    rows = store.read_replicas(columns=["point_key", "replica", "gamma_strips"])
    preview, _ = preview_run(recipe, prep.frozen, rows, prep.previous)
    return prep.frozen, preview


def goal_plan(recipe: Recipe, frozen: Frozen, store_dir: str | Path | None) -> dict:
    """``plan`` with a goal: the pilot round's CPU and the projected CPU to the goal.

    The projection (:func:`~sweepctl.campaign.progress.project_goal`) needs data: the
    store's rows when it has any; for a rehearsal recipe without them, a pilot drawn in
    process from the law with the campaign's seeds (what the first round would store);
    for the network kernel without them, only the pilot's price (run the pilot, then
    plan on its store).
    """
    from sweepctl.campaign.plan import replica_seed
    from sweepctl.campaign.progress import build_progress, project_goal, replica_price

    assert recipe.goal is not None
    rows = None
    if store_dir is not None and Store(store_dir).exists():
        rows = Store(store_dir).read_replicas(columns=["point_key", "replica", "gamma_strips"])
    progress = build_progress(recipe, frozen, rows)
    out = {
        "nu_halfwidth": recipe.goal.nu_halfwidth,
        "cpu_hours": recipe.goal.cpu_hours,
        "pilot_replicas": None,
        "pilot_cpu_hours": None,
        "basis": None,
        "projected_cpu_hours": None,
    }
    live = [pp for pp in progress.values() if not pp.failed]
    prices = {pp.point.key: replica_price(frozen, None, pp) for pp in live}
    if any(v is None for v in prices.values()):
        out["note"] = "pricing replicas needs a kernel calibration: give --calibration FILE"
        return out
    # the first round every goal campaign runs: ``replica.initial`` at every point
    pilot = build_progress(recipe, frozen, None)
    out["pilot_replicas"] = sum(pp.wanted for pp in pilot.values())
    out["pilot_cpu_hours"] = (
        sum(pp.wanted * prices[k] for k, pp in pilot.items() if k in prices) / 3600.0
    )
    law = frozen.rehearsal()
    if rows is not None and rows.num_rows:
        out["basis"] = f"the store's {rows.num_rows:,} replicas"
    elif law is not None:
        for pp in live:
            for r in range(pilot[pp.point.key].wanted):
                p = pp.point
                seed = replica_seed(frozen.entropy, p, r)
                pp.done[r] = law.strip_gammas(p.width, p.x, pp.layers, frozen.strips, seed)
        out["basis"] = "a pilot round drawn from the rehearsal law"
    else:
        out["note"] = (
            "the CPU to the goal is projected from data: run the pilot round "
            "(`sweepctl run`, stopped after its first allocation), then plan on its store"
        )
        return out
    proj = project_goal(recipe, frozen, progress, lambda pp: prices[pp.point.key])
    out["projected_cpu_hours"] = proj["projected_cpu_hours"]
    out["slices"] = proj["slices"]
    if proj["projected_cpu_hours"] is None:
        out["note"] = "no scaling form is stable on these data yet: the rounds grow uniformly"
    return out
