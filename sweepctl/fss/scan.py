"""Model comparison: every order combination and smallest-width window, and a choice.

The choice follows the practice of Slevin and Ohtsuki (Phys. Rev. Lett. 82, 382 (1999);
[M5] tests/REFERENCES.md): accept fits with goodness-of-fit probability ≥ 0.1, prefer the
fewest parameters, and require ν to be stable when the smallest widths are dropped.  The
probability is :attr:`Fit.p_value`, which accounts for errors estimated from few strips
when the data carry ``n_strips`` ([S2] tests/REFERENCES.md; :mod:`sweepctl.fss.fit`).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

from sweepctl.fss.fit import NU_DESIGN, Fit, FitError, ScalingData, explore
from sweepctl.fss.model import Orders, ScalingModel

#: goodness-of-fit probability a fit needs to be acceptable
P_ACCEPT = 0.1
Z95 = 1.959963984540054  # two-sided 95 % normal quantile
#: widths a window of the scan must span, whatever the form. With two widths a free ν is
#: the exponent of a two-point ratio (for the even forms, of the curvature at the
#: crossing): any ν fits, the scaling form's N-dependence is not tested, and the window's
#: interval is that of an effective exponent, which the procedure prints separately
#: (:func:`sweepctl.fss.procedure.effective_exponents`). Measured: two-width windows were
#: the "stable choice" on a real clean-network campaign (widths 16, 32: ν = 2.98
#: [2.68, 3.23], excluding [P1]'s 2.593) and on a rehearsal store (widths 32, 64:
#: ν = 2.659 [2.639, 2.682] for a law with ν = 2.6), both narrower than what the data
#: can say.
SCAN_MIN_WIDTHS = 3
#: design points optimised per ν bin in a scan row (the chosen window is explored again
#: more thoroughly for its branches, :mod:`sweepctl.fss.procedure`)
SCAN_PER_BIN = 1


@dataclass
class ScanRow:
    model: ScalingModel
    n_min: int
    fit: Fit | None
    error: str = ""
    #: every distinct minimum found (lowest χ² first; ``fit`` is the first)
    minima: list[Fit] = field(default_factory=list)

    @property
    def acceptable(self) -> bool:
        """p ≥ 0.1 and no parameter pinned on a bound of the search (a degenerate fit)."""
        return self.fit is not None and self.fit.p_value >= P_ACCEPT and not self.fit.at_bound

    def nu_ci(self) -> tuple[float, float]:
        """Linearised 95 % interval of ν (±1.96 σ from the projected Jacobian)."""
        if self.fit is None:
            return (math.nan, math.nan)
        nu, s = self.fit.values()["nu"], self.fit.linear_error("nu")
        return (nu - Z95 * s, nu + Z95 * s)

    @property
    def determines_nu(self) -> bool:
        """:func:`determines_nu` of the window's fit."""
        return self.fit is not None and determines_nu(self.fit)


def determines_nu(f: Fit) -> bool:
    """The fit's data determine ν: its linearised 95 % interval is finite and lies inside
    the range the exploration searches (``NU_DESIGN``, ν ∈ [0.5, 6]).

    A wider interval says the form cannot tell ν from its other parameters on these
    points (few widths, or an irrelevant field that merges with the relevant one): such a
    window agrees with every other window's ν, so without this test it passes for
    "stable" while saying nothing (measured: orders 2,1,1,0 on widths 16–64 of a
    rehearsal slice, ν = 1.96 ± 1.4·10⁴, chosen by the allocator's form rule).
    """
    nu, s = f.values()["nu"], f.linear_error("nu")
    lo, hi = nu - Z95 * s, nu + Z95 * s
    return math.isfinite(lo) and math.isfinite(hi) and NU_DESIGN[0] <= lo and hi <= NU_DESIGN[1]


def candidate_models(max_orders: Orders, symmetric: bool, with_log: bool) -> list[ScalingModel]:
    """All orders up to ``max_orders`` (m_I only with n_I > 0), fewest parameters first."""
    out = []
    for n_r, n_i, m_r, m_i in itertools.product(
        range(1, max_orders.n_R + 1),
        range(0, max_orders.n_I + 1),
        range(1, max_orders.m_R + 1),
        range(0, max_orders.m_I + 1),
    ):
        if n_i == 0 and m_i > 0:
            continue
        o = Orders(n_r, n_i, m_r, m_i)
        m = ScalingModel(o, symmetric=symmetric)
        # symmetric forms drop odd terms: skip orders that add nothing new
        if symmetric and (n_r % 2 == 1 or (m_r > 1 and m_r % 2 == 0) or (m_i % 2 == 1)):
            continue
        out.append(m)
        if with_log and n_i > 0:
            out.append(ScalingModel(o, symmetric=symmetric, correction="log"))
    return sorted(out, key=lambda m: (m.n_params, m.correction != "power", m.orders.label()))


def scan(
    data: ScalingData,
    max_orders: Orders,
    *,
    symmetric: bool,
    with_log: bool = True,
    progress=None,
) -> list[ScanRow]:
    """Fit every candidate model at every smallest width that leaves at least
    :data:`SCAN_MIN_WIDTHS` widths."""
    widths = data.widths()
    rows = []
    models = candidate_models(max_orders, symmetric, with_log)
    jobs = [(m, n) for m in models for n in widths]
    jobs = [(m, n) for m, n in jobs if len([w for w in widths if w >= n]) >= SCAN_MIN_WIDTHS]
    for k, (m, n_min) in enumerate(jobs):
        try:
            minima = explore(data, m, n_min=n_min, per_bin=SCAN_PER_BIN)
            rows.append(ScanRow(m, n_min, minima[0], minima=minima))
        except FitError as exc:
            rows.append(ScanRow(m, n_min, None, str(exc)))
        if progress is not None:
            progress(k + 1, len(jobs))
    return rows


def _overlap(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return max(a[0], b[0]) <= min(a[1], b[1])


def _track(groups: list[list[tuple[float, float]]]) -> float | None:
    """A ν lying in one interval of every group (pairwise overlap of one interval per
    group is, on a line, a common point), or None."""
    ends = sorted(lo for g in groups for lo, _ in g)
    for v in ends:
        if all(any(lo <= v <= hi for lo, hi in g) for g in groups):
            return v
    return None


def _cis(row: ScanRow, acceptable_only: bool) -> list[tuple[float, float]]:
    out = []
    for f in row.minima or ([row.fit] if row.fit is not None else []):
        if acceptable_only and not (f.p_value >= P_ACCEPT and not f.at_bound):
            continue
        nu, s = f.values()["nu"], f.linear_error("nu")
        if math.isfinite(s):
            out.append((nu - Z95 * s, nu + Z95 * s))
    return out


def stable_windows(rows: list[ScanRow]) -> list[ScanRow]:
    """Each power-law model's stable window (fewest parameters first); see
    :func:`stable_choice` for the rule."""
    by_model: dict[ScalingModel, list[ScanRow]] = {}
    for r in rows:
        by_model.setdefault(r.model, []).append(r)
    out = []
    for m in sorted(by_model, key=lambda m: (m.n_params, m.orders.label())):
        if m.correction != "power":
            continue
        wins = sorted(by_model[m], key=lambda r: r.n_min)
        for k, r in enumerate(wins):
            upward = wins[k:]
            if not all(w.acceptable for w in upward):
                continue
            groups = [_cis(w, acceptable_only=True) for w in upward]
            if k > 0 and wins[k - 1].fit is not None:
                groups.append(_cis(wins[k - 1], acceptable_only=False))
            if all(groups) and _track(groups) is not None and r.determines_nu:
                out.append(r)
            break  # a larger N_min would only drop the evidence of stability
    return out


def stable_choice(rows: list[ScanRow]) -> ScanRow | None:
    """The lowest-order power-law model whose ν is stable from an acceptable N_min on.

    For each model (fewest parameters first) take the smallest N_min such that every
    window from it upwards is acceptable (p ≥ 0.1, no parameter on a bound — e.g. y → 0,
    where the irrelevant field merges with the constant) and ν does not move when the
    smallest widths are dropped: some value of ν lies in the linearised 95 % interval of
    one acceptable minimum (branch) of each of those windows and of one minimum of the
    next smaller window.  Tracking branches matters: when a form has two minima, the
    lowest χ² can jump between them from one window to the next while each branch is
    itself stable.  The first model with such a window is returned at that window.
    """
    wins = stable_windows(rows)
    return wins[0] if wins else None
