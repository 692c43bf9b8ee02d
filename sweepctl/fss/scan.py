"""Model comparison: every order combination and smallest-width window, and a choice.

The choice follows the practice of Slevin and Ohtsuki (Phys. Rev. Lett. 82, 382 (1999)):
accept fits with goodness-of-fit probability ≥ 0.1, prefer the fewest parameters, and
require ν to be stable when the smallest widths are dropped.
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
        return self.fit is not None and self.fit.p_value >= P_ACCEPT

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
    for k, (m, n_min) in enumerate(jobs):
        need = 3 if m.has_irrelevant else 2
        if len([w for w in widths if w >= n_min]) < need:
            continue
        try:
            rows.append(ScanRow(m, n_min, fit(data, m, n_min=n_min)))
        except FitError as exc:
            rows.append(ScanRow(m, n_min, None, str(exc)))
        if progress is not None:
            progress(k + 1, len(jobs))
    return rows


def stable_choice(rows: list[ScanRow]) -> ScanRow | None:
    """The lowest-order power-law model whose acceptable fits agree on ν across N_min.

    A model qualifies when it has an acceptable fit (p ≥ 0.1) and the linearised 95 %
    intervals of ν of all its acceptable windows overlap pairwise; a model that can be
    fitted at only one window qualifies on that one.  The returned row is the qualifying
    model at its smallest acceptable N_min (the most data).
    """
    by_model: dict[ScalingModel, list[ScanRow]] = {}
    for r in rows:
        by_model.setdefault(r.model, []).append(r)
    for m in sorted(by_model, key=lambda m: (m.n_params, m.orders.label())):
        if m.correction != "power":
            continue
        ok = sorted((r for r in by_model[m] if r.acceptable), key=lambda r: r.n_min)
        if not ok:
            continue
        cis = [r.nu_ci() for r in ok]
        if all(
            max(a[0], b[0]) <= min(a[1], b[1]) for a, b in itertools.combinations(cis, 2)
        ) and all(math.isfinite(c[0]) for c in cis):
            return ok[0]
    return None
