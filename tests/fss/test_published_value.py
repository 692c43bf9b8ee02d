"""ν of the clean network from a stored real campaign, against the published value (slow).

The campaign (``tests/data/clean-network-nu.toml``: widths 8–64, nine couplings in
[−0.24, 0.24], 0.3 % per point, 100 000-layer replicas of 8 strips) takes 1.7 CPU-hours by
``sweepctl plan``, too long to repeat in CI; it is run with ``sweepctl run`` and its store
kept in ``tests/data/clean-network-nu`` (complete: 63 points, 462 replicas). Two tests
show the numbers are this kernel's: ``audit`` recomputes stored replicas from their seeds,
and the stored Γ are self-dual. The fit is then the default procedure on a copy of the
store: it must not print a confident wrong ν, and the published check (an acceptable fit
whose own budget holds [P1], excludes [P9] and puts x_c at 0 in the general form) is a
strict xfail with what was measured: at 0.3 % per point these data do not decide.

Measured beside it (not a test): the kernel's own duality at N = 16, x = ±0.24 with 384
strips of 100 000 layers each gave Γ = 1.25991 ± 0.00071 and 1.25885 ± 0.00075, 1.0σ
apart, where the campaign's pairs differed most; that clears the kernel there, not
everywhere. The campaign's duality χ² (43.1 for 28 pairs) and its per-width dispersion
both say the error bars look about 1.2 times small: a fluctuation, or strips less
independent than assumed, which more strips alone would not cure.
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
        # the campaign is stored part-run (it takes 1.7 CPU-hours); these checks wait for it
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
        "measured on the complete campaign (462 replicas): no acceptable form at any N_min "
        "(best p = 0.117 at N_min = 32 with ν undetermined; χ²/dof ≈ 1.5 with corrections "
        "at every N_min); the points scatter more than their error bars suggest without "
        "a scaling form too (fit's dispersion check, even degree 8 per width, i.e. the "
        "duality test of the pairs: χ² = 43.1 for 28 dof, p = 0.043 with estimated "
        "variances), so the check waits for more strips per point"
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
