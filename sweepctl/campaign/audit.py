"""Audit a store: integrity, the seed trace behind a number, bitwise recomputation."""

from __future__ import annotations

import random
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from sweepctl.campaign.plan import ReplicaSpec
from sweepctl.campaign.recipe import Point
from sweepctl.campaign.store import (
    ADDED_COLUMNS,
    BUILD_COLUMNS,
    REPLICA_SCHEMA,
    Duplicate,
    Store,
    code_version,
)
from sweepctl.campaign.summary import store_recipe
from sweepctl.errors import SweepctlError

__all__ = [
    "AuditReport",
    "audit_store",
    "parse_selector",
    "recompute",
    "replay_allocations",
    "seed_trace",
]

_PROVENANCE = (
    "worker",
    "host",
    "started",
    "finished",
    "sweepctl_version",
    "git_commit",
    "numpy_version",
    "entropy",
    "spawn_key",
    "bit_generator",
)


@dataclass
class AuditReport:
    files: int = 0
    rows: int = 0
    problems: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    duplicates: list[Duplicate] = field(default_factory=list)
    recomputed: list[dict] = field(default_factory=list)
    #: with a goal: the replay of the campaign's rounds against its ``allocation`` events
    #: (``rounds_logged``, ``rounds_replayed``, ``mismatches``), else None
    allocation: dict | None = None

    @property
    def ok(self) -> bool:
        return not self.problems and all(r["verdict"] != MISMATCH for r in self.recomputed)


def audit_store(store: Store) -> AuditReport:
    """Integrity checks; every problem is one line in ``report.problems``."""
    rep = AuditReport()
    _campaign, _, frozen = store_recipe(store)
    entropy = f"{frozen.entropy:#x}"
    pinned = REPLICA_SCHEMA.remove_metadata()
    # part files written before columns were added are still this store's
    earlier = [
        pa.schema([f for f in pinned if f.name not in ADDED_COLUMNS[i:]])
        for i in range(len(ADDED_COLUMNS))
    ]
    readable = True
    for path in store.part_files():
        rep.files += 1
        try:
            t = pq.read_table(path)
        except Exception as exc:
            rep.problems.append(f"{path.name}: unreadable ({type(exc).__name__}: {exc})")
            readable = False
            continue
        if not (
            t.schema.remove_metadata().equals(pinned)
            or any(t.schema.remove_metadata().equals(e) for e in earlier)
        ):
            rep.problems.append(f"{path.name}: schema differs from the pinned replica schema")
            readable = False
            continue
        d = t.to_pydict()
        for i in range(t.num_rows):
            rep.rows += 1
            key, r = d["point_key"][i], d["replica"][i]
            where = f"{path.name} row {i} ({key}, replica {r})"
            missing = [c for c in _PROVENANCE if d[c][i] in (None, "", [])]
            if missing:
                rep.problems.append(f"{where}: missing provenance {', '.join(missing)}")
                continue
            pt = Point(d["p_block"][i], d["p_open"][i], d["epsilon"][i], d["width"][i], d["x"][i])
            if pt.key != key:
                rep.problems.append(f"{where}: point_key does not match its parameters")
            if d["entropy"][i] != entropy:
                rep.problems.append(
                    f"{where}: entropy {d['entropy'][i]} is not the campaign's {entropy}"
                )
            if list(d["spawn_key"][i]) != [*pt.key_ints, r]:
                rep.problems.append(
                    f"{where}: spawn key does not derive from the point and replica"
                )
            if d["bit_generator"][i] != "PCG64":
                rep.problems.append(f"{where}: unknown bit generator {d['bit_generator'][i]}")
            g = d["gamma_strips"][i]
            if g is None or len(g) != d["strips"][i] or not np.all(np.isfinite(g)):
                rep.problems.append(
                    f"{where}: gamma_strips missing, of the wrong length or not finite"
                )
    if readable:
        rows = store.collect_replica_rows(["point_key", "replica"])
        for d in rows.conflicts:
            rep.problems.append(
                f"{d.other_file}: replica {d.replica} of {d.point_key} is also in "
                f"{d.first_file} with different numbers (an integrity error: every command "
                "refuses this store until one of them is removed)"
            )
        for d in rows.identical:
            rep.duplicates.append(d)
            rep.warnings.append(
                f"{d.other_file}: replica {d.replica} of {d.point_key} is also in "
                f"{d.first_file} with identical numbers (counted once everywhere)"
            )
    for p in store.root.rglob(".*.tmp-*"):
        rep.warnings.append(
            f"leftover temporary {p.relative_to(store.root)} (removed by the next run)"
        )
    n_bad = 0
    if store.events_file.exists():
        for line in store.events_file.read_text(errors="replace").splitlines():
            if line.strip():
                try:
                    import json

                    json.loads(line)
                except ValueError:
                    n_bad += 1
    if n_bad:
        rep.warnings.append(f"events.jsonl: {n_bad} unparsable line(s)")
    if readable:
        replay_allocations(store, rep)
    return rep


#: fields of an ``allocation`` event a replay must reproduce exactly, and those compared
#: to rounding (floats from fits, in case the replaying machine's BLAS rounds otherwise)
_EXACT = ("reason", "forms", "replicas")
_CLOSE = ("nu", "nu_halfwidth", "projected_halfwidth", "cpu_seconds_spent", "cpu_seconds_round")
#: compared to rounding (events logged before the goal check have neither and are not
#: replayed)
_CLOSE_IF_LOGGED = ("aim_halfwidth", "check")


def replay_allocations(store: Store, rep: AuditReport) -> None:
    """Replay a goal campaign's rounds from the stored rows and compare them with the
    logged ``allocation`` events (decisions are a pure function of complete prefixes,
    :class:`~sweepctl.campaign.progress.GoalRounds`); mismatches are problems.

    Also a problem: a replica stored beyond what the decisions asked for, and a round
    logged that the stored rows cannot reach. The replay uses the latest recipe; a
    round decided under an earlier goal is compared with what the current one decides.
    """
    from sweepctl.campaign.progress import GoalRounds, build_progress, replica_price

    _, recipe, frozen = store_recipe(store)
    if recipe.goal is None:
        return
    rows = store.read_replicas(columns=["point_key", "replica", "gamma_strips"])
    progress = build_progress(recipe, frozen, rows)
    if any(frozen.price_for(pp.point) is None for pp in progress.values()):
        rep.warnings.append(
            "allocation events not replayed: the store has no frozen replica prices "
            "(made before they were frozen, or never run with a calibration)"
        )
        return
    logged: dict[int, list[dict]] = {}
    for e in store.read_events():
        if e.get("event") == "allocation" and isinstance(e.get("round"), int):
            logged.setdefault(e["round"], []).append(e)
    if any("aim_halfwidth" not in e for es in logged.values() for e in es):
        # decided by an earlier sweepctl, before the goal check and the three-width
        # windows: today's rules would decide otherwise, which is not a problem of the store
        rep.warnings.append(
            "allocation events not replayed: they were logged by an earlier sweepctl "
            "(before the goal check); a run with this version decides the next rounds"
        )
        return
    rounds = GoalRounds(recipe, frozen, lambda pp: replica_price(frozen, None, pp))
    replayed = {d["round"]: d for d in rounds.advance(progress)}
    bad: list[str] = []
    for r in sorted(logged):
        want = replayed.get(r)
        for e in logged[r]:
            if want is None:
                bad.append(
                    f"allocation round {r} is logged but the stored rows replay only to "
                    f"round {max(replayed, default=0)} (rows of its prefixes are missing)"
                )
                break
            diff = [k for k in _EXACT if e.get(k) != want[k]]
            diff += [k for k in _CLOSE if not _close(e.get(k), want[k])]
            # the check's bounds are percentiles of resampled refits: looser (another
            # BLAS rounds each refit otherwise)
            diff += [k for k in _CLOSE_IF_LOGGED if k in e and not _close(e[k], want.get(k), 1e-6)]
            if diff:
                bad.append(
                    f"allocation round {r}: the logged {', '.join(diff)} differ from the "
                    "replay of the stored rows"
                )
    for r in sorted(set(replayed) - set(logged)):
        rep.warnings.append(
            f"allocation round {r} replays but is not logged yet (the next run logs it)"
        )
    for key, pp in sorted(progress.items()):
        extra = sorted(i for i in pp.done if i >= pp.wanted)
        if extra:
            bad.append(
                f"{key}: replica(s) {', '.join(map(str, extra[:5]))} stored but no decision "
                f"asked for more than {pp.wanted}"
            )
    rep.problems += bad
    rep.allocation = {
        "rounds_logged": len(logged),
        "rounds_replayed": len(replayed),
        "reason": rounds.reason,
        "mismatches": len(bad),
    }


def _close(a, b, rel: float = 1e-9) -> bool:
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_close(a[k], b[k], rel) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_close(x, y, rel) for x, y in zip(a, b, strict=True))
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return abs(a - b) <= rel * max(abs(a), abs(b), 1e-300)
    return a == b


def parse_selector(text: str) -> dict[str, float]:
    """``"N=8,x=0.1,p=0.1"`` → filter; keys N (or width), x, p, p_block, p_open, epsilon."""
    out: dict[str, float] = {}
    for part in text.split(","):
        if not part.strip():
            continue
        if "=" not in part:
            raise SweepctlError(f"--point: {part!r} is not key=value; write e.g. --point N=8,x=0.1")
        k, v = (s.strip() for s in part.split("=", 1))
        k = {"N": "width", "n": "width", "eps": "epsilon"}.get(k, k)
        if k not in {"width", "x", "p", "p_block", "p_open", "epsilon"}:
            raise SweepctlError(
                f"--point: unknown key {k!r}; use N, x, p, p_block, p_open, epsilon"
            )
        try:
            out[k] = float(v)
        except ValueError:
            raise SweepctlError(f"--point: {k}={v!r} is not a number") from None
    return out


def _matches(row: dict, sel: dict[str, float]) -> bool:
    for k, v in sel.items():
        if k == "p":
            if not (np.isclose(row["p_block"], v) and np.isclose(row["p_open"], v)):
                return False
        elif not np.isclose(row[k], v, rtol=1e-9, atol=1e-12):
            return False
    return True


def seed_trace(store: Store, selector: dict[str, float]) -> list[dict]:
    """Every replica row behind the selected point(s), with its seed and provenance."""
    t = store.read_replicas()
    every = t.to_pylist()
    rows = [r for r in every if _matches(r, selector)]
    if not rows:
        sel = ",".join(f"{'N' if k == 'width' else k}={v:g}" for k, v in selector.items())
        widths = sorted({int(r["width"]) for r in every})
        xs = sorted({float(r["x"]) for r in every})
        raise SweepctlError(
            f"--point {sel}: no stored replica matches; the store holds N in {widths} and "
            f"x in [{', '.join(f'{x:g}' for x in xs[:12])}{', …' if len(xs) > 12 else ''}]"
        )
    rows.sort(key=lambda r: (r["point_key"], r["replica"]))
    keep = (
        "point_key",
        "replica",
        "entropy",
        "spawn_key",
        "bit_generator",
        "layers",
        "warmup",
        "strips",
        "Gamma",
        "worker",
        "host",
        "batch_job_id",
        "started",
        "finished",
        "resumed_at_layer",
        "sweepctl_version",
        "git_commit",
        "numpy_version",
    )
    return [{k: r[k] for k in keep} for r in rows]


#: verdicts of a recomputation
IDENTICAL, LAST_BITS, MISMATCH = "bit-identical", "last-bits", "mismatch"
#: Largest relative difference read as rounding when the build differs. Rounding
#: differences (FMA contraction, another BLAS kernel) stay at the level of the unit
#: roundoff times the frame's condition (≲ 1e-3 / eps · eps, see the kernel's
#: re-orthogonalisation budget) per QR and average out over a replica; a real change of
#: the computation moves Γ by far more.
LAST_BITS_RTOL = 1e-6


def recompute(
    store: Store, k: int, seed: int | None = None, selector: dict | None = None
) -> list[dict]:
    """Recompute ``k`` random replicas from their logged seeds and compare.

    Verdicts: ``bit-identical``; ``last-bits`` — the stored row comes from another build
    or CPU family (:data:`BUILD_COLUMNS`) and every number agrees to
    :data:`LAST_BITS_RTOL`; ``mismatch`` — any difference on the same build, or a larger
    one on another.
    """
    store_recipe(store)
    rows = store.read_replicas().to_pylist()
    if selector:
        rows = [r for r in rows if _matches(r, selector)]
    rng = random.Random(seed)
    chosen = rng.sample(rows, min(k, len(rows)))
    here = code_version()
    out = []
    for r in sorted(chosen, key=lambda r: (r["point_key"], r["replica"])):
        spec = ReplicaSpec.from_row(r)
        from sweepctl.campaign.worker import compute_replica

        new = compute_replica(spec, use_checkpoint=False)
        old_v = np.concatenate([np.asarray(r["gamma_strips"]), np.asarray(r["exponents"])])
        new_v = np.concatenate([np.asarray(new.gamma_strips), np.asarray(new.exponents)])
        same_build = all(r.get(c) == here[c] for c in BUILD_COLUMNS)
        rel = float(np.max(np.abs(new_v - old_v) / np.maximum(np.abs(old_v), 1e-300)))
        if old_v.tobytes() == new_v.tobytes():
            verdict = IDENTICAL
        elif not same_build and rel <= LAST_BITS_RTOL:
            verdict = LAST_BITS
        else:
            verdict = MISMATCH
        out.append(
            {
                "point_key": r["point_key"],
                "replica": r["replica"],
                "verdict": verdict,
                "identical": verdict == IDENTICAL,
                "same_build": same_build,
                "max_rel_diff": rel,
                "stored_Gamma": r["Gamma"],
                "recomputed_Gamma": float(np.mean(new.gamma_strips)),
                "stored_code": _code_text(r),
                "current_code": _code_text(here),
            }
        )
    return out


def _code_text(d: dict) -> str:
    return (
        f"{d['sweepctl_version']} {d['git_commit']} numpy {d['numpy_version']} "
        f"numba {d.get('numba_version') or '?'} cpu {d.get('cpu') or '?'}"
    )
