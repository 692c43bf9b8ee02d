"""``plan --store``: what ``run`` would do on an existing store, without writing to it."""

from __future__ import annotations

from pathlib import Path

from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.driver import prepare_campaign
from sweepctl.campaign.plan import Frozen
from sweepctl.campaign.progress import RunPreview, preview_run
from sweepctl.campaign.recipe import Recipe
from sweepctl.campaign.store import Store

__all__ = ["preview_on_store"]


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
