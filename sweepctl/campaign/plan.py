"""From a recipe to work: frozen settings, seeds, replica specs, rounds, cost.

Seeds. A campaign has 128-bit entropy fixed when its store is created. Replica ``r``
of point ``P`` is seeded by ``SeedSequence(entropy, spawn_key=(*P.key_ints, r))``,
where ``key_ints`` derive from ``P``'s canonical parameters, never from its position
in a list: adding widths later leaves every existing seed unchanged.

Rounds. A point starts with ``initial`` replicas. Whenever every replica of the
current prefix ``0..R-1`` is complete, the relative standard error of ``Γ`` over all
their strips decides: done if it meets the target *and* rests on at least
``min_strip_estimates`` independent strip values, otherwise enough further replicas
to reach both (assuming error ∝ 1/√replicas, with 20 % margin), bounded by the cap.
Decisions use complete prefixes only, so the number of replicas a point ends with
depends neither on timing nor on the number of workers.

Why a minimum number of strips. The error bar is the sample standard deviation ``s``
of ``n`` strip values over √n. For Gaussian values ``s`` has relative standard error
≈ 1/√(2(n−1)) ([S1] tests/REFERENCES.md), so with the 16 strips of two 8-strip
replicas ``s`` scatters by ≈ 18 %; a stop rule on such an ``s`` picks the points whose
``s`` came out low, and a fit that takes ``s`` as exact misjudges χ². Requiring
``n ≥ 51`` keeps ``s`` within ≈ 10 % (1/√100); the number is frozen in the store.
"""

from __future__ import annotations

import math
import secrets
from dataclasses import asdict, dataclass, field

import numpy as np

from sweepctl.campaign.cost import CostModel
from sweepctl.campaign.recipe import Point, Recipe, RecipeError, TomlLiteral, toml_value
from sweepctl.kernel.rehearsal import RehearsalModel

__all__ = [
    "CostModel",
    "Frozen",
    "ReplicaSpec",
    "check_compatible",
    "expected_replicas",
    "freeze",
    "make_plan",
    "next_target",
    "relative_error",
    "replica_seed",
    "slice_key",
]

#: relative error of Γ ≈ √(c·N/(Γ·L)) for L measured strip-layers: c = k = 1.00 ± 0.014 of
#: the strip variance k·N·Γ/L ([R1], [M3] of tests/REFERENCES.md; measured here on the clean
#: network, no published source). Used for plans and estimates only.
ERROR_CONSTANT = 1.0
#: Γ assumed by plans before any data (near the critical value ≈ 0.8–0.9).
GAMMA_GUESS = 0.85
_MARGIN = 1.2
#: Default per-point cap when the recipe gives none: this many replicas.
DEFAULT_CAP_REPLICAS = 256
#: Independent strip estimates a point needs before its stop rule may fire: the
#: sample standard deviation of n values is then known to 1/√(2(n−1)) = 10 % ([S1]).
MIN_STRIP_ESTIMATES = 51


def replica_seed(entropy: int, point: Point, replica: int) -> np.random.SeedSequence:
    """The seed of replica ``replica`` of ``point``."""
    return np.random.SeedSequence(entropy, spawn_key=(*point.key_ints, int(replica)))


def slice_key(point: Point) -> str:
    """Key of the point's (width, disorder, ε) slice in :class:`Frozen`'s tables."""
    return f"N={point.width}|pb={point.p_block!r}|po={point.p_open!r}|eps={point.epsilon!r}"


@dataclass
class Frozen:
    """Settings fixed when a store is created (or a width first appears) and kept.

    ``replica_layers`` and ``max_layers`` are keyed by width (layers given in the recipe,
    and stores made before per-slice keys) or by :func:`slice_key` (a duration or
    CPU-hour budget, converted once per slice with this machine's calibration — the
    cost depends on disorder and ε as much as on N — so that results never depend on
    machine speed afterwards). A slice key wins over its width's key.
    """

    entropy: int
    strips: int
    warmup: int | None
    replica_layers: dict[int | str, int] = field(default_factory=dict)
    max_layers: dict[int | str, int] = field(default_factory=dict)
    replica_rule: dict = field(default_factory=dict)  # what the recipe said, for checks
    #: the cap as the recipe gave it (``max_layers`` / ``max_cpu_hours``): a change of
    #: it re-derives every cap
    cap_rule: dict = field(default_factory=dict)
    #: strip estimates before a point may stop (0 in stores made before the rule)
    min_strip_estimates: int = MIN_STRIP_ESTIMATES
    #: what computes a replica: ``{"kind": "network"}`` or the rehearsal law
    #: (:meth:`~sweepctl.kernel.rehearsal.RehearsalModel.to_dict`); never changes
    model: dict = field(default_factory=lambda: {"kind": "network"})
    #: with a goal on ν: CPU seconds of one replica per point key, priced once by the
    #: calibration in use when the point first appears and kept, so that the goal rounds
    #: and their budget decide the same on any machine (the price depends on the
    #: coupling too, through the QR schedule, hence per point)
    replica_prices: dict[str, float] = field(default_factory=dict)

    def rehearsal(self) -> RehearsalModel | None:
        """The rehearsal law, or None for the network kernel."""
        return RehearsalModel.from_dict(self.model) if self.model["kind"] == "rehearsal" else None

    def warmup_for(self, width: int) -> int:
        from sweepctl.kernel.network import default_warmup

        return self.warmup if self.warmup is not None else default_warmup(width)

    @staticmethod
    def _lookup(table: dict, point: Point) -> int | None:
        k = slice_key(point)
        return table[k] if k in table else table.get(point.width)

    def layers_for(self, point: Point) -> int:
        """Measured layers per replica at ``point``."""
        return int(self._lookup(self.replica_layers, point))

    def cap_for(self, point: Point) -> int:
        """Per-point cap on measured layers."""
        return int(self._lookup(self.max_layers, point))

    def max_replicas(self, point: Point) -> int:
        return max(1, self.cap_for(point) // self.layers_for(point))

    def price_for(self, point: Point) -> float | None:
        """The frozen CPU seconds of one replica at ``point``, or None if none is frozen."""
        v = self.replica_prices.get(point.key)
        return None if v is None else float(v)

    def min_replicas(self) -> int:
        """Replicas needed for :attr:`min_strip_estimates` strip values."""
        return max(1, math.ceil(self.min_strip_estimates / self.strips))

    def to_json(self) -> dict:
        d = asdict(self)
        d["entropy"] = f"{self.entropy:#x}"
        d["replica_layers"] = {str(k): v for k, v in self.replica_layers.items()}
        d["max_layers"] = {str(k): v for k, v in self.max_layers.items()}
        return d

    @classmethod
    def from_json(cls, d: dict) -> Frozen:
        def keyed(t: dict) -> dict:
            return {(int(k) if k.isdigit() else k): int(v) for k, v in t.items()}

        return cls(
            entropy=int(d["entropy"], 16),
            strips=int(d["strips"]),
            warmup=d["warmup"],
            replica_layers=keyed(d["replica_layers"]),
            max_layers=keyed(d["max_layers"]),
            replica_rule=d.get("replica_rule", {}),
            cap_rule=d.get("cap_rule", {}),
            # stores made before the rule keep the decisions they were made with
            min_strip_estimates=int(d.get("min_strip_estimates", 0)),
            # stores made before models could be chosen ran the network kernel
            model=d.get("model") or {"kind": "network"},
            # stores made before frozen prices priced each decision with the calibration
            replica_prices={k: float(v) for k, v in (d.get("replica_prices") or {}).items()},
        )


def _cap_rule(recipe: Recipe) -> dict:
    return {"max_layers": recipe.max_layers, "max_cpu_hours": recipe.max_cpu_hours}


def _rule(recipe: Recipe) -> dict:
    return {
        "layers": recipe.replica_layers,
        "duration_seconds": recipe.replica_seconds,
        "warmup": recipe.warmup,
        "strips": recipe.strips,
    }


#: Replica duration when the recipe gives neither layers nor a duration.
DEFAULT_REPLICA_SECONDS = 300.0


def freeze(
    recipe: Recipe,
    cost: CostModel | None,
    previous: Frozen | None = None,
    default_seconds: float = DEFAULT_REPLICA_SECONDS,
    source: str = "recipe",
) -> Frozen:
    """Frozen settings for ``recipe``: new slices are added, existing ones kept.

    Replica lengths never change once frozen, nor (with a goal) replica prices. Caps
    follow the recipe: when its ``max_layers`` / ``max_cpu_hours`` differ from what the
    store recorded, every cap is derived again (so a raised cap reopens capped points),
    otherwise the recorded conversion is kept. ``default_seconds`` is the replica
    duration used when the recipe names none (a batch profile passes a fraction of its
    walltime).
    """
    if previous is None:
        entropy = recipe.entropy if recipe.entropy is not None else secrets.randbits(128)
        fz = Frozen(
            entropy=entropy,
            strips=recipe.strips,
            warmup=recipe.warmup,
            replica_rule=_rule(recipe),
            cap_rule=_cap_rule(recipe),
            model=recipe.model_record,
        )
    else:
        fz = Frozen.from_json(previous.to_json())
        if fz.cap_rule != _cap_rule(recipe):
            fz.max_layers = {}
            fz.cap_rule = _cap_rule(recipe)
    by_slice: dict[str, list[Point]] = {}
    for p in recipe.points():
        by_slice.setdefault(slice_key(p), []).append(p)
    for sk, pts in by_slice.items():
        n = pts[0].width
        if fz._lookup(fz.replica_layers, pts[0]) is None:
            if recipe.replica_layers is not None:
                fz.replica_layers[n] = int(recipe.replica_layers)
            else:
                fz.replica_layers[sk] = _replica_layers(recipe, cost, pts, fz, default_seconds)
        if fz._lookup(fz.max_layers, pts[0]) is None:
            if recipe.max_layers is not None:
                fz.max_layers[n] = max(int(recipe.max_layers), fz.layers_for(pts[0]))
            else:
                fz.max_layers[sk] = _cap_layers(recipe, cost, pts, fz.layers_for(pts[0]))
        if fz.max_replicas(pts[0]) < fz.min_replicas():
            field_name = (
                "precision.max_cpu_hours"
                if recipe.max_cpu_hours is not None
                else "precision.max_layers"
            )
            need = fz.min_replicas() * fz.layers_for(pts[0])
            raise RecipeError(
                field_name,
                recipe.max_cpu_hours if recipe.max_cpu_hours is not None else fz.cap_for(pts[0]),
                f"at N = {n} the cap allows {_count(fz.max_replicas(pts[0]), 'replica')} of "
                f"{fz.strips} strips, fewer than the {fz.min_strip_estimates} strip estimates "
                f"an error bar needs; allow at least {need:_} layers per point",
                source,
            )
    if recipe.goal is not None and cost is not None:
        for p in recipe.points():
            if p.key not in fz.replica_prices:
                fz.replica_prices[p.key] = cost.replica_seconds(
                    p, fz.layers_for(p), fz.warmup_for(p.width), fz.strips
                )
    return fz


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}" + ("" if n == 1 else "s")


def _slice_seconds(cost: CostModel, pts: list[Point], strips: int) -> float:
    """Seconds per strip-layer of the slice's dearest point (its replicas stay within
    the duration asked for)."""
    return max(cost.point_seconds(p, strips) for p in pts)


def _replica_layers(
    recipe: Recipe, cost: CostModel | None, pts: list[Point], fz: Frozen, default_seconds: float
) -> int:
    if cost is None:
        raise ValueError("a replica duration needs a kernel calibration")
    secs = recipe.replica_seconds or default_seconds
    per_layer = _slice_seconds(cost, pts, recipe.strips) * recipe.strips
    return int(max(64, round(secs / per_layer) - fz.warmup_for(pts[0].width)))


def _cap_layers(recipe: Recipe, cost: CostModel | None, pts: list[Point], layers: int) -> int:
    if recipe.max_cpu_hours is not None:
        if cost is None:
            raise ValueError("a CPU-hour cap needs a kernel calibration")
        per_layer = _slice_seconds(cost, pts, recipe.strips) * recipe.strips
        cap = round(recipe.max_cpu_hours * 3600.0 / per_layer)
    else:
        cap = DEFAULT_CAP_REPLICAS * layers
    return max(int(cap), int(layers))


def check_compatible(recipe: Recipe, frozen: Frozen, source: str) -> None:
    """Refuse recipe changes that would alter results already in the store."""
    if recipe.entropy is not None and recipe.entropy != frozen.entropy:
        raise RecipeError(
            "campaign.entropy",
            TomlLiteral(f"{recipe.entropy:#x}"),
            f"the store was created with entropy {frozen.entropy:#x}; changing it would "
            "change every seed — remove the line or use a new store",
            source,
        )
    _check_model(recipe, frozen, source)
    old = frozen.replica_rule
    new = _rule(recipe)
    names = {
        "layers": "replica.layers",
        "duration_seconds": "replica.duration_seconds",
        "warmup": "replica.warmup",
        "strips": "replica.strips",
    }
    for k, field_name in names.items():
        if old.get(k) != new[k]:
            raise RecipeError(
                field_name,
                TomlLiteral("(not set)") if new[k] is None else new[k],
                f"the store was made with {field_name} = {toml_value(old.get(k))}; changing "
                "it would "
                "change existing results — restore it or use a new store",
                source,
            )


def _check_model(recipe: Recipe, frozen: Frozen, source: str) -> None:
    """Refuse a change of the model kind or of any rehearsal parameter."""
    old, new = frozen.model, recipe.model_record
    if old == new:
        return
    keys = ["kind"] + [k for k in (*old, *new) if k != "kind"]
    k = next(k for k in dict.fromkeys(keys) if old.get(k) != new.get(k))
    shown = new.get(k, "network" if k == "kind" else None)
    raise RecipeError(
        f"model.{k}",
        TomlLiteral("(not set)") if shown is None else shown,
        f"the store was made with model.{k} = {toml_value(old.get(k))}; changing the model "
        "would change existing results — restore it or use a new store",
        source,
    )


@dataclass(frozen=True)
class ReplicaSpec:
    """Everything a worker needs to compute one replica (plain data, picklable)."""

    point: Point
    replica: int
    entropy: int
    layers: int
    warmup: int
    strips: int
    checkpoint: str
    checkpoint_seconds: float
    #: the rehearsal law, or None for the network kernel
    model: RehearsalModel | None = None
    #: a rehearsal replica's CPU seconds as the network kernel would spend them (the
    #: cost model's price, set by the driver); what its row stores as cpu_seconds
    virtual_seconds: float | None = None

    @classmethod
    def from_row(cls, row: dict) -> ReplicaSpec:
        """The computation behind a stored replica row (no checkpoint), to recompute it."""
        import json

        rec = json.loads(row["model"]) if row.get("model") else {"kind": "network"}
        return cls(
            point=Point(row["p_block"], row["p_open"], row["epsilon"], row["width"], row["x"]),
            replica=row["replica"],
            entropy=int(row["entropy"], 16),
            layers=row["layers"],
            warmup=row["warmup"],
            strips=row["strips"],
            checkpoint="",
            checkpoint_seconds=1e9,
            model=RehearsalModel.from_dict(rec) if rec["kind"] == "rehearsal" else None,
        )

    @property
    def key(self) -> str:
        """Stable Dask key."""
        return f"replica-{self.point.short}-{self.replica}"

    def digest(self) -> str:
        """Identity of the computation (not of where it checkpoints)."""
        import hashlib

        ident = (
            f"{self.point.key}|r={self.replica}|e={self.entropy:#x}"
            f"|L={self.layers}|w={self.warmup}|S={self.strips}"
        )
        if self.model is not None:  # network digests stay as they were
            import json

            ident += "|model=" + json.dumps(self.model.to_dict(), sort_keys=True)
        return hashlib.sha256(ident.encode()).hexdigest()


def relative_error(gamma_strips: np.ndarray) -> float:
    """Relative standard error of the mean of per-strip Γ values."""
    g = np.asarray(gamma_strips, dtype=float)
    if g.size < 2:
        return math.inf
    mean = float(np.mean(g))
    if mean == 0.0:
        return math.inf
    return float(np.std(g, ddof=1) / math.sqrt(g.size) / abs(mean))


def next_target(
    prefix_gammas: list[np.ndarray], target: float, max_replicas: int, min_estimates: int = 0
) -> int:
    """Replica count a point should reach, given the complete prefix ``0..R-1``.

    Returns ``R`` when the target is met on at least ``min_estimates`` strip values,
    or the cap is reached (the point is done).
    """
    r = len(prefix_gammas)
    if r >= max_replicas:
        return r
    n = sum(int(np.size(g)) for g in prefix_gammas)
    rel = relative_error(np.concatenate(prefix_gammas)) if r else math.inf
    if rel <= target and n >= min_estimates:
        return r
    want = math.ceil(r * (rel / target) ** 2 * _MARGIN) if math.isfinite(rel) else 2 * r
    if n < min_estimates and r:
        want = max(want, math.ceil(min_estimates / (n / r)))
    return int(min(max_replicas, max(r + 1, want)))


def expected_replicas(width: int, target: float, layers: int, strips: int, cap: int) -> int:
    """A priori replica count from the error model (plans and estimates only)."""
    strip_layers = ERROR_CONSTANT * width / (GAMMA_GUESS * target**2)
    return int(min(cap, max(1, math.ceil(strip_layers / (layers * strips)))))


def make_plan(
    recipe: Recipe,
    cost: CostModel,
    cost_source: str,
    frozen: Frozen | None = None,
    source: str = "recipe",
) -> dict:
    """The plan of a recipe as plain data (what ``sweepctl plan`` shows).

    ``frozen``: the settings of an existing store (``plan --store``); by default those
    a new store would get. CPU is priced per point (:class:`CostModel`: disorder, ε and
    coupling set the QR schedule); replica counts are the error model's a-priori guess.
    """
    fz = frozen if frozen is not None else freeze(recipe, cost, None, source=source)
    points = recipe.points()
    groups: dict[str, dict] = {}
    per_point = []
    total_reps = 0
    total_hours = 0.0
    for p in points:
        n = p.width
        layers, warm, cap = fz.layers_for(p), fz.warmup_for(n), fz.max_replicas(p)
        reps = max(
            min(max(recipe.initial, fz.min_replicas()), cap),
            expected_replicas(n, recipe.target, layers, recipe.strips, cap),
        )
        hours = cost.replica_seconds(p, layers, warm, recipe.strips) / 3600.0
        per_point.append(
            {
                "point": p.key,
                "N": n,
                "x": p.x,
                "p_block": p.p_block,
                "p_open": p.p_open,
                "epsilon": p.epsilon,
                "replica_layers": layers,
                "expected_replicas": reps,
                "qr_per_layer": cost.qr_per_layer(p, recipe.strips),
                "cpu_hours_per_replica": hours,
                "cpu_hours": hours * reps,
            }
        )
        g = groups.setdefault(
            slice_key(p),
            {
                "N": n,
                "p_block": p.p_block,
                "p_open": p.p_open,
                "epsilon": p.epsilon,
                "points": 0,
                "replica_layers": layers,
                "warmup": warm,
                "strips": recipe.strips,
                "expected_replicas_per_point": reps,
                "max_replicas": cap,
                "cpu_hours_per_replica": 0.0,
                "cpu_hours": 0.0,
            },
        )
        g["points"] += 1
        g["cpu_hours_per_replica"] = max(g["cpu_hours_per_replica"], hours)
        g["cpu_hours"] += hours * reps
        total_reps += reps
        total_hours += hours * reps
    n_max = max(p.width for p in points)
    dearest = max(
        (p for p in points if p.width == n_max), key=lambda q: cost.point_seconds(q, recipe.strips)
    )
    spl = cost.point_seconds(dearest, recipe.strips) * recipe.strips
    ten_min = max(64, int(600.0 / spl) - fz.warmup_for(n_max))
    rep_secs = cost.replica_seconds(
        dearest, fz.layers_for(dearest), fz.warmup_for(n_max), recipe.strips
    )
    wall_min = math.ceil((6 * rep_secs + 600) / 900.0) * 15
    return {
        "campaign": recipe.name,
        "model": fz.model,
        "points": len(points),
        "replicas": total_reps,
        "cpu_hours": total_hours,
        "cost_source": cost_source,
        "target": recipe.target,
        "min_strip_estimates": fz.min_strip_estimates,
        "seed_scheme": (
            "replica r of point P uses SeedSequence(entropy, spawn_key=(*key_ints(P), r)), "
            "key_ints = four 32-bit words of SHA-256(P's canonical key); entropy "
            + (
                "fixed in the recipe"
                if recipe.entropy is not None
                else "drawn once when the store is created"
            )
        ),
        "suggestion": (
            f"replica.layers ≈ {ten_min:,} for ~10-minute replicas at N = {n_max} "
            f"(p_block = {dearest.p_block:g}, p_open = {dearest.p_open:g}); batch walltime "
            f"≥ {wall_min // 60}:{wall_min % 60:02d} (6 replicas of the dearest slice per job, "
            "plus start-up); replica.checkpoint_seconds = 180"
        ),
        "widths": sorted(
            groups.values(), key=lambda g: (g["N"], g["p_block"], g["p_open"], g["epsilon"])
        ),
        "per_point": per_point,
    }
