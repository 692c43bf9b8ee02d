"""Is Γ independent of the regularisation ε? Per width, a χ² test of flatness in ε.

For each (disorder, N, x) the ε-values' Γ are compared with their weighted mean;
χ² = Σ ((Γ_ε − Γ̄)/σ_ε)² with (number of ε − 1) degrees of freedom per x, summed over x
([M6] tests/REFERENCES.md: independent Gaussian estimates of one value).  The recommended
range is the longest run of ε values, starting from the smallest, over which every width
is flat (p ≥ 0.05).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

P_FLAT = 0.05


@dataclass
class FlatRow:
    p_block: float
    p_open: float
    N: int
    epsilons: list[float]
    chi2: float
    dof: int

    @property
    def p_value(self) -> float:
        return float(stats.chi2.sf(self.chi2, self.dof)) if self.dof > 0 else float("nan")

    @property
    def flat(self) -> bool:
        return self.dof > 0 and self.p_value >= P_FLAT


def _flatness(group: pd.DataFrame, eps: list[float]) -> tuple[float, int]:
    chi2, dof = 0.0, 0
    part = group[group["epsilon"].isin(eps)]
    for _, g in part.groupby("x"):
        if len(g) < 2:
            continue
        w = 1.0 / g["Gamma_err"].to_numpy() ** 2
        mean = float(np.sum(w * g["Gamma"]) / np.sum(w))
        chi2 += float(np.sum(w * (g["Gamma"].to_numpy() - mean) ** 2))
        dof += len(g) - 1
    return chi2, dof


def epsilon_check(df: pd.DataFrame) -> tuple[list[FlatRow], dict]:
    """Flatness per (disorder, width) over all ε, and the recommended ε range.

    Returns the rows and ``{(p_block, p_open): (eps_low, eps_high)}``; empty when the
    table has fewer than two ε values.
    """
    if "epsilon" not in df.columns or df["epsilon"].nunique() < 2:
        return [], {}
    rows, ranges = [], {}
    for (pb, po), dg in df.groupby(["p_block", "p_open"]):
        eps = sorted(float(e) for e in dg["epsilon"].unique())
        for n, g in dg.groupby("N"):
            chi2, dof = _flatness(g, eps)
            rows.append(FlatRow(float(pb), float(po), int(n), eps, chi2, dof))
        best = eps[:1]
        for k in range(2, len(eps) + 1):
            sub = eps[:k]
            flats = [_flatness(g, sub) for _, g in dg.groupby("N")]
            if all(d == 0 or stats.chi2.sf(c, d) >= P_FLAT for c, d in flats):
                best = sub
            else:
                break
        ranges[(float(pb), float(po))] = (best[0], best[-1])
    return rows, ranges


def describe_range(pb: float, po: float, lo: float, hi: float) -> str:
    """One sentence on the recommended ε range of a disorder pair."""
    head = f"p_block={pb:g}, p_open={po:g}: "
    if lo == hi:
        return head + (
            f"only the smallest ε ({lo:g}) is recommended: Γ changes between it and the next "
            "value for some width; add smaller ε values to show convergence"
        )
    return head + f"recommended ε range [{lo:g}, {hi:g}] (every width flat, p ≥ {P_FLAT:g})"
