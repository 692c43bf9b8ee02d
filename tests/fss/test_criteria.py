"""Leading-order dominance ([M8] tests/REFERENCES.md) on forms whose correction share is
known in closed form."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sweepctl.fss import Orders, ScalingData, ScalingModel
from sweepctl.fss.criteria import correction_share, leading_order
from sweepctl.fss.fit import Fit

WIDTHS = (8, 16, 32, 64)
X = np.linspace(-0.2, 0.2, 7)


def _fit(model: ScalingModel, theta, f) -> Fit:
    n = np.repeat(np.asarray(WIDTHS, float), X.size)
    x = np.tile(X, len(WIDTHS))
    g = model.evaluate(np.asarray(theta, float), np.asarray(f, float), x, n)
    data = ScalingData(n, x, g, 0.001 * g)
    return Fit(model, np.asarray(theta, float), np.asarray(f, float), 0.0, 1, 8, g.size, data=data)


SYM = ScalingModel(Orders(2, 1, 1, 0), symmetric=True)  # f = f00, f20, f01, f21


@pytest.mark.parametrize("f21", [0.05, 0.6, 3.0, -2.0])
def test_share_of_a_cross_term_is_its_closed_form(f21):
    nu, y, f20 = 2.5, -0.45, 0.5
    fit = _fit(SYM, [nu, y], [0.8, f20, 0.4, f21])
    share, width = correction_share(fit)
    # derived: with u0 = x and u1 = 1, R = f20 ψ0² and C = f21 ψ0² N^y at every x, so
    # ‖C‖/‖R‖ = |f21| N_max^y / |f20| at N_max = 64
    assert width == 64
    assert share == pytest.approx(abs(f21) * 64**y / f20, rel=1e-12)
    assert leading_order(fit).ok == (abs(f21) * 64**y / f20 <= 1.0)


def test_the_threshold_is_where_the_correction_equals_the_leading_term():
    nu, y, f20 = 2.5, -0.45, 0.5
    edge = f20 * 64 ** (-y)  # derived: share = 1 here
    assert leading_order(_fit(SYM, [nu, y], [0.8, f20, 0.4, 0.99 * edge])).ok
    assert not leading_order(_fit(SYM, [nu, y], [0.8, f20, 0.4, 1.01 * edge])).ok


def test_a_drifting_crossing_value_is_not_counted():
    # derived: a pure ψ1 term (f01) with u1 = 1 shifts Γ equally at every x, C = 0
    general = ScalingModel(Orders(2, 1, 1, 0))  # θ = ν, y, x_c; f = f00 f10 f20 f01 f11 f21
    fit = _fit(general, [2.5, -0.3, 0.03], [0.8, -0.9, 0.5, 5.0, 0.0, 0.0])
    assert correction_share(fit)[0] == pytest.approx(0.0, abs=1e-12)
    assert leading_order(fit).ok


def test_a_form_without_an_irrelevant_field_always_passes():
    fit = _fit(ScalingModel(Orders(2, 0, 1, 0), symmetric=True), [2.5], [0.8, 0.5])
    assert correction_share(fit) == (0.0, 64)


def test_a_correction_with_no_leading_term_to_correct_is_ruled_out():
    # f20 = 0: all of Γ's x-dependence comes from the cross term (share = ∞, derived)
    fit = _fit(SYM, [2.5, -0.45], [0.8, 0.0, 0.4, 0.3])
    share, _ = correction_share(fit)
    assert math.isinf(share)
    assert not leading_order(fit).ok


def test_an_effective_exponent_outside_the_headline_is_flagged():
    from dataclasses import replace

    from sweepctl.fss.procedure import run
    from tests.fss import synthetic as syn

    # invented table without corrections (synthetic.SYMMETRIC_CHEAP, ν = 2.6): the
    # effective exponent of the largest pair estimates ν itself (derived: F(x N^{1/ν})
    # has curvature ∝ N^{2/ν} exactly), so no caution
    data = syn.make(3, syn.SYMMETRIC_CHEAP, np.array([2.6]), np.array([0.8, 0.5]))
    o = run(data, symmetric=True, orders=Orders(2, 0, 1, 0), resamples=50)
    assert o.acceptable and o.effective_outside() is None, o.effective[-1]
    # the same outcome with the last pair's estimate moved 10 of its own errors above
    # the headline interval's upper end is flagged
    e = o.effective[-1]
    o.effective[-1] = replace(e, nu=o.interval("nu")[1] + 10 * e.err)
    assert o.effective_outside() is o.effective[-1]
