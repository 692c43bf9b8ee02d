"""The model-free self-duality check of a stored clean-network campaign ([K7])."""

from __future__ import annotations

from pathlib import Path

from scipy import stats

from sweepctl import analysis


def self_duality(store: Path) -> tuple[float, int, float]:
    """(χ², pairs, p) of Γ(N, x) − Γ(N, −x) over every stored pair x > 0, −x.

    [K7] tests/REFERENCES.md: at p_block = p_open, Γ(N, x) and Γ(N, −x) are equal in
    distribution, so each difference scatters with variance σ²(x) + σ²(−x) and the sum
    is χ² with one degree of freedom per pair.
    """
    df = analysis.load(store)
    chi2, pairs = 0.0, 0
    for _, g in df.groupby("N"):
        by_x = {
            round(float(x), 9): (G, e)
            for x, G, e in zip(g["x"], g["Gamma"], g["Gamma_err"], strict=True)
        }
        for x, (G, e) in by_x.items():
            if x > 0:
                G2, e2 = by_x[-x]
                chi2 += (G - G2) ** 2 / (e**2 + e2**2)
                pairs += 1
    return chi2, pairs, float(stats.chi2.sf(chi2, pairs))
