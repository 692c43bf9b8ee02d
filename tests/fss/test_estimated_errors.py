"""Errors estimated from few strips: the data's ``n_strips``, the points table's column, and
the goodness-of-fit probability against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from sweepctl.fss import FitError, ScalingData, fit
from sweepctl.fss.data import read_points, select, slices
from sweepctl.fss.fit import GOF_ESTIMATED, GOF_EXACT, gof_probability
from tests.fss import synthetic as syn


def _chi2_sf_3(x: float) -> float:
    """Tail of χ² with 3 degrees of freedom, by hand: 2(1 − Φ(√x)) + √(2x/π) e^{−x/2}."""
    return math.erfc(math.sqrt(x / 2)) + math.sqrt(2 * x / math.pi) * math.exp(-x / 2)


def _coordinate_basis(points: int, params: int) -> np.ndarray:
    """Basis e_1..e_k: each parameter moves one point only (leverage 1 there, 0 elsewhere)."""
    return np.eye(points)[:, :params]


def test_one_free_residual_has_the_student_t_tail():
    # [S2] tests/REFERENCES.md: with a coordinate basis the fit absorbs the first k points
    # whatever their weights, so χ² is the last point's (Γ − μ)²/σ̂² = t² with n − 1 = 15
    # dof, and P(t² ≥ 4) = 2·t.sf(2, 15) ≈ 0.064 (chi2.sf(4, 1) ≈ 0.046 would be wrong).
    # The probability averages a tail g ∈ [0, 1] over 20 000 draws; Var g ≤ E g² ≤ E g = p,
    # so its standard error is ≤ √(p/20 000) ≈ 0.0018: allow 4 of them.
    n = np.full(4, 16.0)
    p = gof_probability(4.0, _coordinate_basis(4, 3), n, draws=20_000)
    expected = 2 * stats.t.sf(2.0, 15)
    tol = 4 * math.sqrt(expected / 20_000)
    assert p == pytest.approx(expected, abs=tol)
    assert abs(stats.chi2.sf(4.0, 1) - expected) > 2 * tol  # the check can tell them apart


@pytest.mark.parametrize("n_strips", [None, np.full(8, np.inf)])
def test_exact_errors_give_the_chi2_tail(n_strips):
    # [S2] tests/REFERENCES.md (σ known): χ² ~ χ²(P − k); here 8 − 5 = 3 dof, by hand.
    q, _ = np.linalg.qr(np.random.default_rng(1).standard_normal((8, 5)))
    assert gof_probability(2.6, q, n_strips) == pytest.approx(_chi2_sf_3(2.6), rel=1e-9)


def test_many_strips_approach_the_chi2_tail():
    # [S1] tests/REFERENCES.md: with n = 10⁶ strips σ̂/σ = 1 ± 7e-4, so the probability
    # differs from the χ²(3) tail by O(1e-3) at most.
    q, _ = np.linalg.qr(np.random.default_rng(2).standard_normal((8, 5)))
    p = gof_probability(2.6, q, np.full(8, 1e6))
    assert p == pytest.approx(_chi2_sf_3(2.6), abs=2e-3)


def test_few_strips_raise_the_probability_of_a_large_chi2():
    # [S2] tests/REFERENCES.md: with 16 strips each term of χ² has mean 15/13, so a χ²
    # 30 % above its dof is no longer unusual: the χ²(46) tail at 60 is ≈ 0.08; with the
    # heavier t² terms (mean 53, standard deviation ≈ 12.5) it must be clearly larger.
    q, _ = np.linalg.qr(np.random.default_rng(3).standard_normal((55, 9)))
    exact = stats.chi2.sf(60.0, 46)  # the textbook tail for σ known
    few = gof_probability(60.0, q, np.full(55, 16.0))
    assert few > 2 * exact, (few, exact)


def test_probability_is_reproducible():
    q, _ = np.linalg.qr(np.random.default_rng(4).standard_normal((20, 4)))
    n = np.full(20, 16.0)
    assert gof_probability(18.0, q, n) == gof_probability(18.0, q, n)
    assert gof_probability(18.0, q, n) != gof_probability(18.0, q, n, seed=5)


@pytest.mark.parametrize(
    ("value", "needle"),
    [(1.0, "n_strips = 1"), (np.nan, "n_strips = nan"), (16.5, "n_strips = 16.5")],
)
def test_bad_strip_counts_are_refused(value, needle):
    data = syn.make(5)
    n = np.full(data.size, 16.0)
    n[3] = value
    with pytest.raises(FitError, match=needle):
        ScalingData(data.N, data.x, data.Gamma, data.Gamma_err, n)
    with pytest.raises(FitError, match="one entry per point"):
        ScalingData(data.N, data.x, data.Gamma, data.Gamma_err, np.full(3, 16.0))


def test_strip_counts_follow_windows_and_resampled_gamma():
    data = syn.make_strips(1, 16)
    assert data.errors_estimated
    w = data.window(16)
    assert w.size == 33 and np.all(w.n_strips == 16)
    g = data.with_gamma(data.Gamma + 1.0, data.Gamma_err * 2)
    assert np.all(g.n_strips == 16) and np.allclose(g.Gamma_err, 2 * data.Gamma_err)
    inf = ScalingData(data.N, data.x, data.Gamma, data.Gamma_err, np.full(data.size, np.inf))
    assert not inf.errors_estimated and inf.n_strips is None
    assert fit(data, syn.CHEAP).gof_method == GOF_ESTIMATED
    assert fit(inf, syn.CHEAP).gof_method == GOF_EXACT


def _points(data: ScalingData, **extra) -> pd.DataFrame:
    df = pd.DataFrame(
        {"N": data.N.astype(int), "x": data.x, "Gamma": data.Gamma, "Gamma_err": data.Gamma_err}
    )
    for k, v in extra.items():
        df[k] = v
    return df


def test_points_table_reads_the_strip_column(tmp_path):
    data = syn.make_strips(2, 51)
    with_col = tmp_path / "with.csv"
    _points(data, n_strips=51).to_csv(with_col, index=False)
    without = tmp_path / "without.csv"
    _points(data).to_csv(without, index=False)
    df = read_points(with_col)
    d = select(df, slices(df)[0])
    assert np.all(d.n_strips == 51)
    assert fit(d, syn.CHEAP).gof_method == GOF_ESTIMATED
    df = read_points(without)
    d = select(df, slices(df)[0])
    assert d.n_strips is None  # a table without the column: errors taken as exact
    assert fit(d, syn.CHEAP).gof_method == GOF_EXACT
    text = _points(data, n_strips="many")
    bad = tmp_path / "bad.csv"
    text.to_csv(bad, index=False)
    with pytest.raises(FitError, match="column n_strips is not numeric"):
        read_points(bad)
