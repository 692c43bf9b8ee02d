"""Per-point round bookkeeping, replayed from stored rows; the preview of a run.

The same replay serves the driver (what to submit), ``status`` (what is left) and
``plan --store`` (what a run would do), so the three cannot disagree.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from sweepctl.campaign.plan import Frozen, next_target, relative_error
from sweepctl.campaign.recipe import Point, Recipe

__all__ = ["PointProgress", "RunPreview", "build_progress", "preview_run"]


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

    def prefix_complete(self) -> bool:
        return all(r in self.done for r in range(self.wanted))

    def decide(self) -> None:
        """Advance the round structure as far as complete prefixes allow."""
        while not self.finished and self.prefix_complete():
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
