"""ν of the clean network from a stored real campaign, against the published value (slow).

The campaign (``tests/data/clean-network-nu.toml``: widths 8–64, nine couplings in
[−0.24, 0.24], 0.15 % per point, 100 000-layer replicas of 8 strips) takes 4.3 CPU-hours by
``sweepctl plan``, too long to repeat in CI; it is run with ``sweepctl run`` and its store
kept in ``tests/data/clean-network-nu`` (complete: 63 points, 1157 replicas, run at 0.3 %,
then resumed at 0.2 % and 0.15 %). Two tests show the numbers are this kernel's:
``audit`` recomputes stored replicas from their seeds, and the stored Γ are self-dual.
The fit is then the default procedure on a copy of the store: it must not print a
confident wrong ν, and the published check (an acceptable fit whose own budget holds
[P1], excludes [P9] and puts x_c at 0 in the general form) is a strict xfail with what
was measured: these data do not decide.

Measured beside it (not a test): at 0.3 % the pairs' duality χ² (43.1 for 28) and the
per-width dispersion check (p = 0.043) said the error bars looked about 1.2 times small;
the kernel's own duality at N = 16, x = ±0.24 with 384 fresh strips agreed to 1.0σ, and
strips inside a replica were uncorrelated (variance ratio 1.06 ± 0.07). At 0.15 % the
dispersion check gives χ² = 26.3 for 28 dof (p = 0.57): it was a fluctuation.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from tests.campaign.helpers import cli
from tests.fss.duality import self_duality

STORE = Path(__file__).resolve().parents[1] / "data" / "clean-network-nu"
#: [P1] tests/REFERENCES.md: ν_CC = 2.593 (N → ∞)
NU_CC = 2.593
#: [P9] tests/REFERENCES.md: classical percolation, ν = 4/3
NU_PERCOLATION = 4 / 3


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A copy of the stored campaign: nothing here may change the repository's files."""
    copy = tmp_path_factory.mktemp("published") / "store"
    shutil.copytree(STORE, copy, ignore=shutil.ignore_patterns("lease", "checkpoints"))
    proc = cli("status", copy, "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    totals = json.loads(proc.stdout)["totals"]
    if totals["done"] + totals["capped"] < totals["points"]:
        # the campaign is stored part-run (it takes 4.3 CPU-hours); these checks wait for it
        pytest.skip(
            f"stored campaign incomplete: {totals['done']} of {totals['points']} points done; "
            "resume with sweepctl run tests/data/clean-network-nu.toml tests/data/clean-network-nu"
        )
    return copy


@pytest.fixture(scope="module")
def fitted(store):
    out = store.parent / "fit.json"
    proc = cli("fit", store, "--out", out, timeout=3600)
    print(proc.stdout)
    assert proc.returncode in (0, 3), proc.stdout + proc.stderr
    return json.loads(out.read_text()), proc


def _budget(res: dict) -> tuple[float, float]:
    """The campaign's own error budget as the procedure reports it (fixed by the
    procedure before this campaign was fitted): ``nu_budget`` (the headline interval,
    every branch, and the intervals of the stable forms near the choice) joined with
    ``nu_range`` (every acceptable fit not ruled out, fixed-y fits included)."""
    lo = min(res["nu_budget"][0], res["nu_range"][0])
    hi = max(res["nu_budget"][1], res["nu_range"][1])
    return lo, hi


@pytest.mark.slow
def test_stored_replicas_are_this_kernels_output(store):
    # tests/kernel holds the kernel's own checks; here: the stored numbers recompute from
    # their seeds (bit-identical on this build, or differing in the last bits on another)
    proc = cli("audit", store, "--recompute", "2", timeout=1800)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "mismatch" not in proc.stdout.lower(), proc.stdout


@pytest.mark.slow
def test_stored_campaign_is_self_dual(store):
    # [K7] tests/REFERENCES.md: Γ(N, x) = Γ(N, −x) in distribution at p_block = p_open;
    # a two-sided χ² test at the 0.1 % level over the pairs x, −x (fixed before the run)
    chi2, pairs, p = self_duality(store)
    assert pairs == 7 * 4
    assert 1e-3 < p < 1 - 1e-3, (chi2, pairs, p)


@pytest.mark.slow
def test_no_confident_wrong_nu(fitted):
    # The procedure's promise on real data: either no acceptable form (exit 3, no
    # headline ν or Γ_c) or an acceptable fit whose budget holds [P1] and excludes [P9].
    # On the stored data it takes the first branch (measured), where this checks only
    # that `fit` keeps its word; the physics is the strict xfail below.
    res, proc = fitted
    if proc.returncode == 3:
        assert not res["acceptable"] and res.get("nu") is None, res
        assert "no acceptable form" in proc.stdout, proc.stdout
        return
    assert res["acceptable"] and res["p_value"] >= 0.1, res  # [M5]: only p ≥ 0.1
    lo, hi = _budget(res)
    assert lo <= NU_CC <= hi and lo > NU_PERCOLATION, (lo, hi, res)  # [P1], [P9]
    for r in res["ruled_out"]:
        assert r["correction_share"] > 1.0, r  # [M8]: only such fits are ruled out


@pytest.mark.slow
@pytest.mark.xfail(
    strict=True,
    raises=AssertionError,
    reason=(
        "measured on the complete campaign at 0.15 % (1157 replicas): no stable acceptable "
        "form over orders up to 4,1,3,1 and every N_min (4,1,1,0 and 4,1,3,0 fit with "
        "p = 0.47-0.90, but nu moves between 2.17 and 2.98 with N_min, with two branches "
        "or y on its bound); the error bars hold width by width (dispersion chi2 = 26.3 for "
        "28 dof, p = 0.57), so the forms are what fails: it waits for larger widths. At "
        "0.2 % (706 replicas) orders 2,1,3,0 at N >= 24 were acceptable (p = 0.100, budget "
        "[1.95, 4.17]) but their general-form refit was not (p = 0.070)"
    ),
)
def test_budget_holds_the_published_value(store, fitted):
    res, proc = fitted
    assert proc.returncode == 0 and res["acceptable"] and res["p_value"] >= 0.1, res  # [M5]
    lo, hi = _budget(res)
    assert lo > NU_PERCOLATION, (lo, hi, res)  # [P9]
    assert lo <= NU_CC <= hi, (lo, hi, res)  # [P1] tests/REFERENCES.md
    o = res["orders"]
    general = store.parent / "general.json"
    proc = cli(
        "fit",
        store,
        "--general",
        "--orders",
        f"{o['n_R']},{o['n_I']},{o['m_R']},{o['m_I']}",
        "--n-min",
        str(res["n_min"]),
        "--out",
        general,
        timeout=3600,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    gen = json.loads(general.read_text())
    # [K7] tests/REFERENCES.md: self-duality at p_block = p_open puts x_c at 0
    assert gen["x_c_ci"][0] <= 0.0 <= gen["x_c_ci"][1], gen
