"""Recipe files: schema, complete validation, canonical form and hash.

A recipe is a TOML file::

    [campaign]
    name = "crossing-demo"
    # entropy = 0x1234...        optional; otherwise drawn once when the store is created

    [axes]
    widths = [4, 8, 16]
    couplings = { start = -0.3, stop = 0.3, num = 7 }     # or a list of numbers
    disorder = [ { p = 0.0 }, { p_block = 0.1, p_open = 0.1 } ]
    epsilon = [1e-6]                # at least 9.57e-7 (see smallest_safe_epsilon)

    [precision]
    target = 0.01              # relative standard error of Γ per point (a floor with [goal])
    max_layers = 5_000_000     # per-point cap on measured layers (or max_cpu_hours)

    [replica]
    layers = 20_000            # measured layers per replica (or duration_seconds)
    warmup = 64                # or "auto": max(5N, 32) per width
    strips = 8
    initial = 2                # replicas in a point's first round

    [model]                    # optional; kind = "network" (the default) or "rehearsal"
    kind = "rehearsal"         # a known scaling law instead of the kernel (see
    nu = 2.6                   # sweepctl.kernel.rehearsal for the exact form)
    Gamma_c = 0.8
    F = [0.4, 0.0, 0.01]       # coefficients of rho, rho^2, ... with rho = (x - x_c) N^(1/nu)

    [goal]                     # optional: aim the campaign at nu instead of per-point errors
    nu_halfwidth = 0.05        # 95 % half-width of nu wanted on every disorder/epsilon slice
    cpu_hours = 2000           # the campaign's CPU budget: it stops here if the goal is not met

With a goal, ``precision.target`` is a floor (no point ends with a worse relative error)
instead of the stop rule.

Everything is checked before anything runs or is written; every problem is reported as
``RecipeError`` with one line naming the field, the value and the way out.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import tomllib
from dataclasses import dataclass
from decimal import Decimal, localcontext
from pathlib import Path
from typing import Any

from sweepctl.errors import SweepctlError
from sweepctl.kernel.rehearsal import RehearsalModel

__all__ = [
    "Goal",
    "Point",
    "Recipe",
    "RecipeError",
    "TomlLiteral",
    "canonical_float",
    "load_recipe",
    "parse_recipe",
    "smallest_safe_epsilon",
    "toml_value",
]

_SECTIONS = {
    "campaign": {"name", "entropy", "description"},
    "axes": {"widths", "couplings", "disorder", "epsilon"},
    "precision": {"target", "max_layers", "max_cpu_hours"},
    "replica": {"layers", "duration_seconds", "warmup", "strips", "initial", "checkpoint_seconds"},
    "model": {"kind", "nu", "y", "Gamma_c", "x_c", "F", "correction", "noise"},
    "goal": {"nu_halfwidth", "cpu_hours"},
}
_REQUIRED = {
    "campaign": {"name"},
    "axes": {"widths", "couplings"},
    "precision": {"target"},
    "replica": set(),
    "model": set(),
    "goal": set(),  # both keys are required once [goal] is there (see _goal)
}
#: how the fix for a missing required key reads
_EXAMPLES = {
    "name": 'name = "my-crossing"',
    "widths": "widths = [8, 16, 32]",
    "couplings": "couplings = { start = -0.2, stop = 0.2, num = 9 }",
    "target": "target = 0.01",
}
_MAX_WIDTH = 4096
_MAX_STRIPS = 4096
_MAX_COUPLING = 10.0
_MAX_POINTS = 1_000_000
_MAX_INITIAL = 10_000


class RecipeError(SweepctlError, ValueError):
    """A recipe problem: ``field``, ``value`` and a one-line ``fix``.

    The line reads ``FILE: FIELD = VALUE: FIX`` with the field as written in TOML and the
    value rendered as TOML; a missing key reads ``FILE: FIELD is missing: FIX``; problems
    with the file itself (``field`` ``(file)``) name the file once, and TOML syntax
    errors (``field`` ``(TOML)``, ``value`` the parser's message) lead with line and
    column.
    """

    def __init__(self, field: str, value: Any, fix: str, source: str = "recipe") -> None:
        self.field, self.value, self.fix, self.source = field, value, fix, source
        if field == "(file)":
            text = f"{source}: {fix}"
        elif field == "(TOML)":
            text = _syntax_line(source, str(value), fix)
        elif value is None:
            text = f"{source}: {field} is missing: {fix}"
        else:
            text = f"{source}: {field} = {toml_value(value)}: {fix}"
        super().__init__(text)


def _syntax_line(source: str, message: str, fix: str) -> str:
    m = re.search(r"\s*\(at line (\d+), column (\d+)\)\s*$", message)
    if m:
        where = f"line {m.group(1)}, column {m.group(2)}"
        return f"{source}: {where}: TOML syntax: {message[: m.start()]}; {fix}"
    m = re.search(r"\s*\(at end of document\)\s*$", message)
    if m:
        return f"{source}: end of file: TOML syntax: {message[: m.start()]}; {fix}"
    return f"{source}: TOML syntax: {message}; {fix}"


def toml_value(value: Any, limit: int = 60) -> str:
    """``value`` as it would be written in TOML (shortened to ``limit`` characters)."""
    text = _toml(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


class TomlLiteral(str):
    """Text shown as written (``0x5eed``), not quoted like a TOML string."""


def _toml(v: Any) -> str:
    if isinstance(v, TomlLiteral):
        return str(v)
    if v is None:
        return "(not set)"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return format_float(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, dict):
        if not v:
            return "{}"
        return "{ " + ", ".join(f"{k} = {_toml(x)}" for k, x in v.items()) + " }"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml(x) for x in v) + "]"
    return str(v)


def format_float(v: float) -> str:
    """Shortest decimal of ``v``, exponent without padding (``9.57e-7``, not ``9.57e-07``)."""
    text = repr(float(v))
    if "e" in text:
        mant, exp = text.split("e")
        text = f"{mant}e{int(exp)}"
    return text


def smallest_safe_epsilon() -> float:
    """The smallest ε whose blocking column the kernel's QR schedule covers.

    A blocking node's block has ``cosh θ = 1/ε``, so one column of them grows the
    frame's condition number by ``e^{2θ}`` (≈ 4/ε²). The engine re-orthogonalises
    before the columns' bound exceeds ``e^B`` with ``B = ln(1e-3/eps) − ORTHO_RESERVE``
    (tests/REFERENCES.md [M2]; the reserve, 0.031, covers a CholeskyQR frame's defect);
    a single column above it would be applied alone, uncovered. Covered iff
    ``2 arccosh(1/ε) ≤ B`` ⇔ ``ε ≥ 1/cosh(B/2)`` ≈ 9.57e-7.
    """
    from sweepctl.kernel.schedule import COLUMN_BUDGET

    return 1.0 / math.cosh(COLUMN_BUDGET / 2.0)


def canonical_float(v: float) -> float:
    """Round to 12 significant digits and fold ``-0.0``: points typed or generated
    differently (``0.1`` vs ``0.30000000000000004 - 0.2``) get one identity."""
    r = float(f"{float(v):.12g}")
    return 0.0 if r == 0.0 else r


@dataclass(frozen=True, order=True)
class Point:
    """One point of a campaign: disorder, regularisation, width, coupling."""

    p_block: float
    p_open: float
    epsilon: float
    width: int
    x: float

    @property
    def key(self) -> str:
        """Canonical identity, independent of position in any list."""
        return (
            f"pb={self.p_block!r}|po={self.p_open!r}|eps={self.epsilon!r}"
            f"|N={self.width}|x={self.x!r}"
        )

    @property
    def key_ints(self) -> tuple[int, int, int, int]:
        """Four 32-bit words from the key's SHA-256: the point's part of every spawn key."""
        d = hashlib.sha256(self.key.encode()).digest()
        return tuple(int.from_bytes(d[4 * i : 4 * i + 4], "little") for i in range(4))  # type: ignore[return-value]

    @property
    def short(self) -> str:
        """Short hex id for file names and Dask keys."""
        return hashlib.sha256(self.key.encode()).hexdigest()[:16]

    def label(self) -> str:
        """Human-readable form."""
        return (
            f"N={self.width} x={self.x:g} p_block={self.p_block:g} p_open={self.p_open:g} "
            f"eps={self.epsilon:g}"
        )


@dataclass(frozen=True)
class Goal:
    """What a fit-aware campaign aims at: ν's 95 % half-width per slice, within a budget."""

    #: 95 % half-width of ν wanted on every disorder/ε slice
    nu_halfwidth: float
    #: CPU-hours the whole campaign may spend (stored replicas included)
    cpu_hours: float

    def to_dict(self) -> dict:
        return {"nu_halfwidth": self.nu_halfwidth, "cpu_hours": self.cpu_hours}


@dataclass(frozen=True)
class Recipe:
    """A validated recipe."""

    name: str
    entropy: int | None
    widths: tuple[int, ...]
    couplings: tuple[float, ...]
    disorder: tuple[tuple[float, float], ...]
    epsilons: tuple[float, ...]
    target: float
    max_layers: int | None
    max_cpu_hours: float | None
    replica_layers: int | None
    replica_seconds: float | None
    warmup: int | None  # None = auto per width
    strips: int
    initial: int
    checkpoint_seconds: float
    description: str = ""
    #: the rehearsal law, or None for the network kernel
    model: RehearsalModel | None = None
    #: the goal on ν (``[goal]``), or None: then ``target`` is each point's stop rule
    goal: Goal | None = None

    @property
    def model_record(self) -> dict:
        """The model as frozen in a store: ``{"kind": "network"}`` or the rehearsal law."""
        return {"kind": "network"} if self.model is None else self.model.to_dict()

    def points(self) -> list[Point]:
        """All points, sorted by their canonical parameters."""
        pts = {
            Point(pb, po, eps, n, x)
            for (pb, po) in self.disorder
            for eps in self.epsilons
            for n in self.widths
            for x in self.couplings
        }
        return sorted(pts)

    def warmup_for(self, width: int) -> int:
        """Warm-up layers at ``width``."""
        from sweepctl.kernel.network import default_warmup

        return self.warmup if self.warmup is not None else default_warmup(width)

    def canonical(self) -> dict:
        """Canonical dict (sorted, normalised); its JSON is what :meth:`digest` hashes.

        A network recipe has no ``model`` key and a recipe without a goal no ``goal`` key,
        so their digests are what they were before recipes could name either."""
        d = {
            "name": self.name,
            "entropy": None if self.entropy is None else f"{self.entropy:#x}",
            "widths": list(self.widths),
            "couplings": list(self.couplings),
            "disorder": [list(d) for d in self.disorder],
            "epsilon": list(self.epsilons),
            "target": self.target,
            "max_layers": self.max_layers,
            "max_cpu_hours": self.max_cpu_hours,
            "replica_layers": self.replica_layers,
            "replica_seconds": self.replica_seconds,
            "warmup": self.warmup,
            "strips": self.strips,
            "initial": self.initial,
            "checkpoint_seconds": self.checkpoint_seconds,
        }
        if self.model is not None:
            d["model"] = self.model.to_dict()
        if self.goal is not None:
            d["goal"] = self.goal.to_dict()
        return d

    @classmethod
    def from_canonical(cls, d: dict) -> Recipe:
        """Inverse of :meth:`canonical` (for recipes recorded in a store)."""
        return cls(
            name=d["name"],
            entropy=None if d["entropy"] is None else int(d["entropy"], 16),
            widths=tuple(d["widths"]),
            couplings=tuple(d["couplings"]),
            disorder=tuple(tuple(x) for x in d["disorder"]),
            epsilons=tuple(d["epsilon"]),
            target=d["target"],
            max_layers=d["max_layers"],
            max_cpu_hours=d["max_cpu_hours"],
            replica_layers=d["replica_layers"],
            replica_seconds=d["replica_seconds"],
            warmup=d["warmup"],
            strips=d["strips"],
            initial=d["initial"],
            checkpoint_seconds=d["checkpoint_seconds"],
            model=RehearsalModel.from_dict(d["model"]) if d.get("model") else None,
            goal=Goal(**d["goal"]) if d.get("goal") else None,
        )

    def digest(self) -> str:
        """SHA-256 of the canonical JSON."""
        blob = json.dumps(self.canonical(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()


# ------------------------------------------------------------------------ checkers


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_num(v: Any) -> bool:
    return (isinstance(v, (int, float)) and not isinstance(v, bool)) and math.isfinite(v)


def _int(src: str, field: str, v: Any, lo: int, fix: str, hi: int | None = None) -> int:
    if isinstance(v, float) and v.is_integer():
        v = int(v)  # 5e6 written as a float is fine
    if not _is_int(v) or v < lo or (hi is not None and v > hi):
        raise RecipeError(field, v, fix, src)
    return int(v)


def _num(src: str, field: str, v: Any, fix: str) -> float:
    if not _is_num(v):
        raise RecipeError(field, v, fix, src)
    return float(v)


def _prob(src: str, field: str, v: Any) -> float:
    p = _num(src, field, v, "a probability must be a number in [0, 1]")
    if not 0.0 <= p <= 1.0:
        raise RecipeError(field, v, "a probability must lie in [0, 1]", src)
    return canonical_float(p)


def _nonempty_list(src: str, field: str, v: Any, example: str) -> list:
    if not isinstance(v, list):
        raise RecipeError(field, v, f"must be a list, e.g. {example}", src)
    if not v:
        raise RecipeError(field, v, f"an axis needs at least one value, e.g. {example}", src)
    return v


def _unique(src: str, field: str, values: list, show: list, indexed: bool = True) -> None:
    seen: dict = {}
    for i, (v, s) in enumerate(zip(values, show, strict=True)):
        if v in seen:
            j, first = seen[v]
            where = f"{field}[{i}]" if indexed else field
            raise RecipeError(
                where,
                s,
                f"the same point as {field}[{j}] = {toml_value(first)}; remove one",
                src,
            )
        seen[v] = (i, s)


def _couplings(src: str, v: Any) -> tuple[float, ...]:
    field = "axes.couplings"
    if isinstance(v, dict):
        extra = set(v) - {"start", "stop", "num"}
        if extra:
            k = sorted(extra)[0]
            raise RecipeError(
                f"{field}.{k}", v[k], "unknown key; a range has start, stop and num", src
            )
        for k in ("start", "stop", "num"):
            if k not in v:
                raise RecipeError(field, v, f"a range needs start, stop and num (missing {k})", src)
        a = _num(src, f"{field}.start", v["start"], "must be a number")
        b = _num(src, f"{field}.stop", v["stop"], "must be a number")
        n = _int(
            src,
            f"{field}.num",
            v["num"],
            1,
            f"a whole number of couplings from 1 to {_MAX_POINTS:_}, e.g. num = 9",
            _MAX_POINTS,
        )
        if n > 1 and not b > a:
            raise RecipeError(
                f"{field}.stop",
                v["stop"],
                f"stop must be greater than start = {toml_value(v['start'])}; swap them",
                src,
            )
        for k, val in (("start", a), ("stop", b)):
            if abs(val) > _MAX_COUPLING:
                raise RecipeError(
                    f"{field}.{k}",
                    v[k],
                    f"couplings lie in -{_MAX_COUPLING:g} <= x <= {_MAX_COUPLING:g} (beyond, "
                    "every strip is deep in a phase)",
                    src,
                )
        xs = _decimal_range(a, b, n)
        cx = [canonical_float(x) for x in xs]
        _unique(src, field, cx, xs, indexed=False)
        return tuple(cx)
    lst = _nonempty_list(src, field, v, "couplings = [-0.2, 0.0, 0.2]")
    xs = [
        _num(src, f"{field}[{i}]", x, f"a number with |x| <= {_MAX_COUPLING:g}, e.g. 0.0")
        for i, x in enumerate(lst)
    ]
    for i, x in enumerate(xs):
        if abs(x) > _MAX_COUPLING:
            raise RecipeError(
                f"{field}[{i}]",
                lst[i],
                f"couplings lie in -{_MAX_COUPLING:g} <= x <= {_MAX_COUPLING:g} (beyond, every "
                "strip is deep in a phase)",
                src,
            )
    cx = [canonical_float(x) for x in xs]
    _unique(src, field, cx, lst)
    return tuple(cx)


def _decimal_range(a: float, b: float, n: int) -> list[float]:
    """``n`` evenly spaced values from ``a`` to ``b``, computed in decimal arithmetic on
    the numbers as written (their shortest repr), then rounded once to binary.

    So a range gives exactly the floats the same decimals give in a list: from −0.2 to
    0.1 in 4 steps is −0.2, −0.1, 0.0, 0.1 (binary arithmetic gives 2.78e-17 for 0).
    """
    if n == 1:
        return [a]
    da, db = Decimal(repr(a)), Decimal(repr(b))
    with localcontext() as ctx:
        ctx.prec = 40
        return [float(da + (db - da) * i / (n - 1)) for i in range(n)]


def _disorder(src: str, v: Any) -> tuple[tuple[float, float], ...]:
    field = "axes.disorder"
    lst = _nonempty_list(src, field, v, "disorder = [{ p = 0.0 }, { p_block = 0.1, p_open = 0.2 }]")
    out = []
    for i, d in enumerate(lst):
        f = f"{field}[{i}]"
        if not isinstance(d, dict):
            raise RecipeError(
                f,
                d,
                "each entry is a table like { p = 0.1 } or { p_block = 0.1, p_open = 0.1 }",
                src,
            )
        extra = set(d) - {"p", "p_block", "p_open"}
        if extra:
            k = sorted(extra)[0]
            raise RecipeError(f"{f}.{k}", d[k], "unknown key; use p, or p_block and p_open", src)
        if "p" in d:
            if "p_block" in d or "p_open" in d:
                raise RecipeError(
                    f,
                    d,
                    "give either p (both probabilities) or p_block and p_open, not both: "
                    f"e.g. {{ p = {toml_value(d['p'])} }}",
                    src,
                )
            pb = po = _prob(src, f"{f}.p", d["p"])
        else:
            if "p_block" not in d or "p_open" not in d:
                raise RecipeError(f, d, "give p, or both p_block and p_open", src)
            pb = _prob(src, f"{f}.p_block", d["p_block"])
            po = _prob(src, f"{f}.p_open", d["p_open"])
        if pb + po > 1.0 + 1e-12:
            raise RecipeError(f, d, "p_block + p_open must not exceed 1", src)
        out.append((pb, po))
    _unique(src, field, out, lst)
    return tuple(out)


_MODEL_KINDS = ("network", "rehearsal")
_MAX_F_TERMS = 8
#: what each rehearsal key means and its allowed range, for the fix of a bad value
_MODEL_RANGES = {
    "nu": ("the localisation-length exponent", 0.2, 10.0, "0.2 <= nu <= 10", "nu = 2.6"),
    "Gamma_c": ("Gamma at the critical point", 0.0, 10.0, "0 < Gamma_c <= 10", "Gamma_c = 0.8"),
    "x_c": (
        "the critical coupling",
        -_MAX_COUPLING,
        _MAX_COUPLING,
        "-10 <= x_c <= 10",
        "x_c = 0.0",
    ),
    "y": ("the leading irrelevant exponent", -5.0, 0.0, "-5 <= y < 0", "y = -0.4"),
    "correction": (
        "the amplitude of the correction N^y",
        -10.0,
        10.0,
        "-10 <= correction <= 10",
        "correction = 0.1",
    ),
    "noise": (
        "the factor on the network's strip noise",
        0.0,
        100.0,
        "0 < noise <= 100",
        "noise = 1.0",
    ),
}


def _model_number(src: str, m: dict, k: str) -> float:
    what, lo, hi, rng, example = _MODEL_RANGES[k]
    field = f"model.{k}"
    v = _num(src, field, m[k], f"{what}: a number with {rng}, e.g. {example}")
    open_lo = k in ("Gamma_c", "noise")
    open_hi = k == "y"
    if v < lo or v > hi or (open_lo and v == lo) or (open_hi and v == hi):
        raise RecipeError(field, m[k], f"{what} must satisfy {rng}, e.g. {example}", src)
    return v


def _model(
    src: str, m: dict, widths: list[int], couplings: tuple[float, ...]
) -> RehearsalModel | None:
    """The ``[model]`` table: ``None`` for the network kernel, or the rehearsal law."""
    kind = m.get("kind", "network")
    if kind not in _MODEL_KINDS:
        raise RecipeError(
            "model.kind",
            kind,
            'kind = "network" (the transfer-matrix kernel) or kind = "rehearsal" (a known '
            "scaling law, no kernel CPU)",
            src,
        )
    if kind == "network":
        for k in sorted(set(m) - {"kind"}):
            raise RecipeError(
                f"model.{k}",
                m[k],
                'applies to kind = "rehearsal" only; remove it, or set kind = "rehearsal"',
                src,
            )
        return None
    for k in ("nu", "Gamma_c", "F"):
        if k not in m:
            example = "F = [0.4, 0.0, 0.01]" if k == "F" else _MODEL_RANGES[k][4]
            raise RecipeError(
                f"model.{k}", None, f'add {example} under [model] (kind = "rehearsal")', src
            )
    nu = _model_number(src, m, "nu")
    gamma_c = _model_number(src, m, "Gamma_c")
    x_c = _model_number(src, m, "x_c") if "x_c" in m else 0.0
    correction = _model_number(src, m, "correction") if "correction" in m else 0.0
    y = _model_number(src, m, "y") if "y" in m else None
    noise = _model_number(src, m, "noise") if "noise" in m else 1.0
    if correction != 0.0 and y is None:
        raise RecipeError(
            "model.y",
            None,
            f"correction = {toml_value(m['correction'])} needs its exponent: add y = -0.4 "
            "(-5 <= y < 0) under [model], or remove correction",
            src,
        )
    fl = m["F"]
    f_fix = (
        f"the coefficients of rho, rho^2, ... (1 to {_MAX_F_TERMS} numbers, each in "
        "[-1000, 1000]), e.g. F = [0.4, 0.0, 0.01]"
    )
    if not isinstance(fl, list) or not 1 <= len(fl) <= _MAX_F_TERMS:
        raise RecipeError("model.F", fl, f_fix, src)
    coef = []
    for i, f in enumerate(fl):
        v = _num(src, f"model.F[{i}]", f, f_fix)
        if abs(v) > 1000.0:
            raise RecipeError(f"model.F[{i}]", f, f_fix, src)
        coef.append(v)
    if not any(coef):
        raise RecipeError(
            "model.F",
            fl,
            "all zero: Gamma would not depend on x and nu could not be seen; give a "
            "non-zero coefficient, e.g. F = [0.4]",
            src,
        )
    law = RehearsalModel(
        nu=nu, Gamma_c=gamma_c, F=tuple(coef), x_c=x_c, y=y, correction=correction, noise=noise
    )
    for n in widths:
        for x in couplings:
            g = law.Gamma(n, x)
            if not (math.isfinite(g) and g > 0.0):
                raise RecipeError(
                    "model.F",
                    fl,
                    f"the law gives Gamma = {g:.3g} at N = {n}, x = {x:g}, but Gamma (N times "
                    "the smallest positive exponent) is positive: change F, Gamma_c or "
                    "correction, or narrow axes.couplings",
                    src,
                )
    return law


#: the largest ν half-width a goal may ask for (ν itself is fitted within [0.2, 50])
_MAX_NU_HALFWIDTH = 5.0
_GOAL_FIX = {
    "nu_halfwidth": (
        "the 95 % half-width of nu wanted per slice: a number with 0 < nu_halfwidth <= "
        f"{_MAX_NU_HALFWIDTH:g}, e.g. nu_halfwidth = 0.05"
    ),
    "cpu_hours": (
        "the campaign's CPU budget in hours: a number with cpu_hours > 0, e.g. cpu_hours = 2000"
    ),
}
_GOAL_MISSING = {
    "nu_halfwidth": "add nu_halfwidth = 0.05 (the 95 % half-width of nu wanted per slice) "
    "under [goal]",
    "cpu_hours": "add cpu_hours = 2000 under [goal]: the campaign stops there if the goal is "
    "not met",
}


def _goal(src: str, g: dict, widths: list[int], couplings: tuple[float, ...]) -> Goal | None:
    """The ``[goal]`` table: ``None`` without one; both keys are required with it."""
    if not g:
        return None
    for k in ("nu_halfwidth", "cpu_hours"):
        if k not in g:
            raise RecipeError(f"goal.{k}", None, _GOAL_MISSING[k], src)
    h = _num(src, "goal.nu_halfwidth", g["nu_halfwidth"], _GOAL_FIX["nu_halfwidth"])
    if not 0.0 < h <= _MAX_NU_HALFWIDTH:
        raise RecipeError("goal.nu_halfwidth", g["nu_halfwidth"], _GOAL_FIX["nu_halfwidth"], src)
    hours = _num(src, "goal.cpu_hours", g["cpu_hours"], _GOAL_FIX["cpu_hours"])
    if not hours > 0.0:
        raise RecipeError("goal.cpu_hours", g["cpu_hours"], _GOAL_FIX["cpu_hours"], src)
    # ν comes from a scaling fit of each slice: it needs sizes and couplings to scale
    if len(widths) < 3:
        raise RecipeError(
            "axes.widths",
            widths,
            "a goal on nu needs a scaling fit over at least 3 widths (with two, nu is only "
            "an effective exponent); add widths or remove [goal]",
            src,
        )
    if len(couplings) < 3:
        raise RecipeError(
            "axes.couplings",
            list(couplings),
            "a goal on nu needs a scaling fit over at least 3 couplings; add couplings or "
            "remove [goal]",
            src,
        )
    return Goal(nu_halfwidth=h, cpu_hours=hours)


def parse_recipe(data: dict, source: str = "recipe") -> Recipe:
    """Validate a decoded TOML document completely and return the :class:`Recipe`."""
    if not isinstance(data, dict):  # pragma: no cover - tomllib always gives a dict
        raise RecipeError("(top level)", data, "a recipe is a TOML document", source)
    for sec in data:
        if sec not in _SECTIONS:
            raise RecipeError(
                sec,
                data[sec],
                f"unknown section; sections are {', '.join(sorted(_SECTIONS))}",
                source,
            )
    for sec, keys in _SECTIONS.items():
        body = data.get(sec, {})
        if not isinstance(body, dict):
            raise RecipeError(sec, body, f"must be a table: [{sec}]", source)
        for k in body:
            if k not in keys:
                raise RecipeError(
                    f"{sec}.{k}",
                    body[k],
                    f"unknown key; [{sec}] takes {', '.join(sorted(keys))}",
                    source,
                )
        for k in sorted(_REQUIRED[sec]):
            if k not in body:
                raise RecipeError(f"{sec}.{k}", None, f"add {_EXAMPLES[k]} under [{sec}]", source)

    c, a, p, r, m = (data.get(s, {}) for s in ("campaign", "axes", "precision", "replica", "model"))
    src = source

    name = c["name"]
    if not isinstance(name, str) or not name.strip() or len(name) > 120:
        raise RecipeError(
            "campaign.name", name, "give a non-empty name of at most 120 characters", src
        )
    entropy = c.get("entropy")
    if entropy is not None:
        if isinstance(entropy, str):
            try:
                entropy = int(entropy, 0)
            except ValueError:
                raise RecipeError(
                    "campaign.entropy",
                    c["entropy"],
                    "an integer in [0, 2**128), e.g. entropy = 0x5eed (no quotes), or remove "
                    "the line to have one drawn",
                    src,
                ) from None
        if not _is_int(entropy) or entropy < 0 or entropy >= 2**128:
            raise RecipeError(
                "campaign.entropy",
                c["entropy"],
                "an integer in [0, 2**128), e.g. entropy = 0x5eed, or remove the line to have "
                "one drawn",
                src,
            )
    description = c.get("description", "")
    if not isinstance(description, str):
        raise RecipeError("campaign.description", description, "must be a string", src)

    wl = _nonempty_list(src, "axes.widths", a["widths"], "widths = [4, 8, 16]")
    widths = [
        _int(
            src,
            f"axes.widths[{i}]",
            w,
            1,
            f"widths must be integers from 1 to {_MAX_WIDTH}",
            _MAX_WIDTH,
        )
        for i, w in enumerate(wl)
    ]
    _unique(src, "axes.widths", widths, wl)
    couplings = _couplings(src, a["couplings"])
    disorder = _disorder(src, a.get("disorder", [{"p": 0.0}]))
    el = _nonempty_list(src, "axes.epsilon", a.get("epsilon", [1e-6]), "epsilon = [1e-6]")
    eps = []
    eps_min = smallest_safe_epsilon()
    eps_range = f"{format_float(float(f'{eps_min:.3g}'))} <= epsilon <= 0.1"
    for i, e in enumerate(el):
        v = _num(src, f"axes.epsilon[{i}]", e, f"epsilon must be a number, {eps_range}")
        if v < eps_min:
            raise RecipeError(
                f"axes.epsilon[{i}]",
                e,
                f"the kernel's accuracy is proven only for {eps_range} (one blocking column "
                "has condition number 4/epsilon^2, which must stay below 1e-3/eps of double "
                "precision between two QRs); use epsilon = 1e-6",
                src,
            )
        if v > 0.1:
            raise RecipeError(
                f"axes.epsilon[{i}]",
                e,
                f"a blocking node's transmission must be small: {eps_range}; e.g. 1e-6",
                src,
            )
        eps.append(canonical_float(v))
    _unique(src, "axes.epsilon", eps, el)

    target = _num(src, "precision.target", p["target"], "a relative precision such as 0.01")
    if not 0.0 < target < 1.0:
        hint = f"; for {target:g} % write {target / 100:g}" if 1.0 <= target < 100.0 else ""
        raise RecipeError(
            "precision.target",
            p["target"],
            f"a relative standard error with 0 < target < 1, e.g. 0.01{hint}",
            src,
        )
    if "max_layers" in p and "max_cpu_hours" in p:
        raise RecipeError(
            "precision.max_cpu_hours",
            p["max_cpu_hours"],
            "give max_layers or max_cpu_hours, not both",
            src,
        )
    max_layers = None
    if "max_layers" in p:
        max_layers = _int(
            src, "precision.max_layers", p["max_layers"], 1, "must be a whole number of layers >= 1"
        )
    max_cpu = None
    if "max_cpu_hours" in p:
        max_cpu = _num(
            src, "precision.max_cpu_hours", p["max_cpu_hours"], "must be a positive number of hours"
        )
        if max_cpu <= 0:
            raise RecipeError(
                "precision.max_cpu_hours", p["max_cpu_hours"], "must be positive", src
            )

    if "layers" in r and "duration_seconds" in r:
        raise RecipeError(
            "replica.duration_seconds",
            r["duration_seconds"],
            "give layers or duration_seconds, not both",
            src,
        )
    rl = rs = None
    if "layers" in r:
        rl = _int(
            src,
            "replica.layers",
            r["layers"],
            1,
            "a whole number of layers >= 1, e.g. layers = 10_000",
        )
    elif "duration_seconds" in r:
        rs = _num(
            src,
            "replica.duration_seconds",
            r["duration_seconds"],
            "must be a positive number of seconds",
        )
        if rs <= 0:
            raise RecipeError(
                "replica.duration_seconds", r["duration_seconds"], "must be positive", src
            )
    # neither: the replica duration defaults at store creation (300 s, or a fraction of
    # a batch profile's walltime)
    warm = r.get("warmup", "auto")
    if warm == "auto":
        warmup = None
    else:
        warmup = _int(
            src, "replica.warmup", warm, 0, 'must be a whole number of layers >= 0 or "auto"'
        )
    sv = r.get("strips", 8)
    strips = _int(
        src,
        "replica.strips",
        sv,
        2,
        f"use at most {_MAX_STRIPS} strips per replica; more strip values come from more "
        "replicas (replica.initial, or a tighter precision.target)"
        if _is_num(sv) and sv > _MAX_STRIPS
        else f"a whole number of strips from 2 to {_MAX_STRIPS} (the error bar is their "
        "spread), e.g. strips = 8",
        _MAX_STRIPS,
    )
    initial = _int(
        src,
        "replica.initial",
        r.get("initial", 2),
        1,
        f"a whole number of replicas in a point's first round, from 1 to {_MAX_INITIAL:_}, "
        "e.g. initial = 2",
        _MAX_INITIAL,
    )
    ck = _num(
        src,
        "replica.checkpoint_seconds",
        r.get("checkpoint_seconds", 180.0),
        "a positive number of seconds",
    )
    if ck <= 0:
        raise RecipeError(
            "replica.checkpoint_seconds", r["checkpoint_seconds"], "must be positive", src
        )
    if max_layers is not None and rl is not None and max_layers < rl:
        raise RecipeError(
            "precision.max_layers",
            max_layers,
            f"the cap is below one replica ({rl} layers); raise it or shorten replica.layers",
            src,
        )

    model = _model(src, m, widths, couplings)
    goal = _goal(src, data.get("goal", {}), widths, couplings)

    recipe = Recipe(
        name=name.strip(),
        entropy=entropy,
        widths=tuple(widths),
        couplings=couplings,
        disorder=disorder,
        epsilons=tuple(eps),
        target=target,
        max_layers=max_layers,
        max_cpu_hours=max_cpu,
        replica_layers=rl,
        replica_seconds=rs,
        warmup=warmup,
        strips=strips,
        initial=initial,
        checkpoint_seconds=ck,
        description=description,
        model=model,
        goal=goal,
    )
    n_points = len(widths) * len(couplings) * len(disorder) * len(eps)
    if n_points > _MAX_POINTS:
        raise RecipeError(
            "axes", n_points, f"more than {_MAX_POINTS} points; split the campaign", src
        )
    return recipe


def load_recipe(path: str | Path) -> Recipe:
    """Read and validate a recipe file."""
    path = Path(path)
    src = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise RecipeError("(file)", src, "no such file; check the path", src) from None
    except OSError as exc:
        raise RecipeError("(file)", src, f"cannot read it ({exc.strerror})", src) from None
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise RecipeError(
            "(file)", src, "not UTF-8 text; save the recipe as UTF-8 TOML", src
        ) from None
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError("(TOML)", str(exc), "fix the TOML there", src) from None
    return parse_recipe(data, src)
