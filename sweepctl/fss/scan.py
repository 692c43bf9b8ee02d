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
from dataclasses import dataclass

from sweepctl.fss.fit import Fit, FitError, ScalingData, fit
from sweepctl.fss.model import Orders, ScalingModel

#: goodness-of-fit probability a fit needs to be acceptable
P_ACCEPT = 0.1
Z95 = 1.959963984540054  # two-sided 95 % normal quantile


@dataclass
class ScanRow:
    model: ScalingModel
    n_min: int
    fit: Fit | None
    error: str = ""

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
    """Fit every candidate model at every smallest width that leaves enough widths."""
    widths = data.widths()
    rows = []
    models = candidate_models(max_orders, symmetric, with_log)
    jobs = [(m, n) for m in models for n in widths]
    need = {m: 3 if m.has_irrelevant else 2 for m in models}
    jobs = [(m, n) for m, n in jobs if len([w for w in widths if w >= n]) >= need[m]]
    for k, (m, n_min) in enumerate(jobs):
        try:
            rows.append(ScanRow(m, n_min, fit(data, m, n_min=n_min)))
        except FitError as exc:
            rows.append(ScanRow(m, n_min, None, str(exc)))
        if progress is not None:
            progress(k + 1, len(jobs))
    return rows


def _overlap(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return max(a[0], b[0]) <= min(a[1], b[1])


def stable_choice(rows: list[ScanRow]) -> ScanRow | None:
    """The lowest-order power-law model whose ν is stable from an acceptable N_min on.

    For each model (fewest parameters first) take the smallest N_min such that every
    window from it upwards is acceptable (p ≥ 0.1, no parameter on a bound — e.g. y → 0,
    where the irrelevant field merges with the constant) and the linearised 95 % ν
    intervals of those windows and of the next smaller window overlap pairwise (ν does
    not move when the smallest widths are dropped).  The first model with such a window
    is returned at that window.
    """
    by_model: dict[ScalingModel, list[ScanRow]] = {}
    for r in rows:
        by_model.setdefault(r.model, []).append(r)
    for m in sorted(by_model, key=lambda m: (m.n_params, m.orders.label())):
        if m.correction != "power":
            continue
        wins = sorted(by_model[m], key=lambda r: r.n_min)
        for k, r in enumerate(wins):
            upward = wins[k:]
            if not all(w.acceptable for w in upward):
                continue
            group = upward + ([wins[k - 1]] if k > 0 and wins[k - 1].fit is not None else [])
            cis = [w.nu_ci() for w in group]
            if all(math.isfinite(c[0]) and math.isfinite(c[1]) for c in cis) and all(
                _overlap(a, b) for a, b in itertools.combinations(cis, 2)
            ):
                return r
            break  # a larger N_min would only drop the evidence of stability
    return None
