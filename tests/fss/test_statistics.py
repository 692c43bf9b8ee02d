"""Statistical honesty of the scaling fit, on invented data from a known form."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from sweepctl.fss import Orders, ScalingModel, fit, resampled_intervals
from sweepctl.fss.scan import scan, stable_choice
from tests.fss import synthetic as syn

SEEDS = range(60)


@pytest.fixture(scope="module")
def coverage_runs():
    """Fit + 200-resample 95 % intervals for 60 independent noisy data sets."""
    out = []
    for seed in SEEDS:
        data = syn.make(1000 + seed)
        best = fit(data, syn.GENERAL)
        cis = resampled_intervals(data, best, resamples=200, seed=seed)
        out.append((best, cis))
    return out


def test_confidence_intervals_cover_the_truth(coverage_runs):
    # Slevin & Ohtsuki, PRL 82, 382 (1999): CIs from refits of Gaussian-resampled data.
    # A 95 % interval must hold the true value in ≥ 90 % of independent data sets
    # (the requirement; with 60 sets, 95 % coverage gives ≥ 54 hits w.p. 0.93).
    truth = {"nu": 2.6, "y": -0.9, "x_c": 0.02}
    for name, value in truth.items():
        hits = sum(lo <= value <= hi for _, c in coverage_runs for lo, hi in [c.bounds[name]])
        assert hits / len(coverage_runs) >= 0.90, (name, hits)
    assert all(c.failed == 0 for _, c in coverage_runs)


def test_goodness_of_fit_probabilities_are_uniform(coverage_runs):
    # derived: for the true form with Gaussian errors, χ² ~ χ²(dof), so P = chi2.sf(χ², dof)
    # is uniform on [0, 1]; Kolmogorov–Smirnov against U(0, 1) must not reject at 1 %.
    p = np.array([b.p_value for b, _ in coverage_runs])
    assert stats.kstest(p, "uniform").pvalue > 0.01, np.sort(p)


def test_chi2_and_probability_are_scipys(coverage_runs):
    best, _ = coverage_runs[0]
    data = syn.make(1000)
    resid = (data.Gamma - best.model.evaluate(best.theta, best.f, data.x, data.N)) / data.Gamma_err
    assert best.chi2 == pytest.approx(float(resid @ resid), rel=1e-12)
    assert best.dof == data.size - best.model.n_params == 55 - 9
    assert best.p_value == stats.chi2.sf(best.chi2, best.dof)


def test_symmetric_form_recovers_nu_with_x_c_fixed():
    # Duality (REFERENCES.md, derived): with u0 odd and u1 even the form is even in x.
    data = syn.make(7, syn.SYMMETRIC, syn.SYMMETRIC_THETA, syn.SYMMETRIC_F)
    assert np.allclose(
        syn.SYMMETRIC.evaluate(syn.SYMMETRIC_THETA, syn.SYMMETRIC_F, data.x, data.N),
        syn.SYMMETRIC.evaluate(syn.SYMMETRIC_THETA, syn.SYMMETRIC_F, -data.x, data.N),
        rtol=1e-14,
    )
    best = fit(data, syn.SYMMETRIC)
    cis = resampled_intervals(data, best, resamples=200, seed=7)
    assert best.values()["x_c"] == 0.0 and best.model.n_params == 6
    lo, hi = cis.bounds["nu"]
    assert lo <= 2.6 <= hi  # invented truth of tests/fss/synthetic.py
    assert best.p_value > 0.001


def test_resampling_does_not_depend_on_chunk_placement():
    data = syn.make(3)
    best = fit(data, syn.GENERAL)
    a = resampled_intervals(data, best, resamples=60, seed=11)
    b = resampled_intervals(
        data,
        best,
        resamples=60,
        seed=11,
        mapper=lambda f, j: map(lambda args: f(*args), reversed(j)),
    )
    c = resampled_intervals(data, best, resamples=60, seed=12)
    assert a.bounds == b.bounds
    assert a.bounds["nu"] != c.bounds["nu"]


def test_scan_chooses_the_generating_orders():
    # invented data from orders (2,1,1,0) (tests/fss/synthetic.py): lower orders cannot
    # describe it (p < 0.1), so the stable choice is the generating form.
    data = syn.make(21)
    rows = scan(data, Orders(2, 1, 2, 0), symmetric=False)
    assert {r.model.correction for r in rows} == {"power", "log"}
    assert {r.n_min for r in rows} == {4, 8, 16, 32}  # n_I = 0 forms need two widths only
    choice = stable_choice(rows)
    assert choice is not None and choice.model == ScalingModel(Orders(2, 1, 1, 0))
    assert choice.fit.p_value >= 0.1
    lo, hi = choice.nu_ci()
    assert lo <= 2.6 <= hi
