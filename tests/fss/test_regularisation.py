"""The ε flatness check on invented tables (values chosen for the test)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from sweepctl.fss.regularisation import epsilon_check

EPS = [1e-8, 1e-6, 1e-4, 1e-2]


def _table(shift_at_largest: float, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for n in (4, 8):
        for x in np.linspace(-0.2, 0.2, 5):
            for e in EPS:
                err = 0.002
                g = 0.85 + 0.3 * x**2 + (shift_at_largest if e == EPS[-1] else 0.0)
                rows.append(
                    dict(
                        p_block=0.1,
                        p_open=0.1,
                        epsilon=e,
                        N=n,
                        x=x,
                        Gamma=g + err * rng.standard_normal(),
                        Gamma_err=err,
                    )
                )
    return pd.DataFrame(rows)


def test_flat_table_recommends_every_epsilon():
    rows, ranges = epsilon_check(_table(0.0))
    assert [r.N for r in rows] == [4, 8]
    assert all(r.dof == 5 * 3 for r in rows)  # derived: (4 ε − 1) per x, 5 couplings
    assert all(r.flat for r in rows), [r.p_value for r in rows]
    assert ranges == {(0.1, 0.1): (1e-8, 1e-2)}


def test_shift_at_the_largest_epsilon_is_excluded():
    # a shift of 10 σ at ε = 1e-2 (invented) must fail the flatness test
    rows, ranges = epsilon_check(_table(0.02))
    assert not any(r.flat for r in rows)
    assert ranges == {(0.1, 0.1): (1e-8, 1e-4)}


def test_single_epsilon_gives_no_check():
    t = _table(0.0)
    assert epsilon_check(t[t.epsilon == 1e-6]) == ([], {})
