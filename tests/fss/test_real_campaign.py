"""ν of the clean-coupling network from a real small campaign (slow: ~2 minutes on 2 cores)."""

from __future__ import annotations

import json

import pytest
from scipy import stats

from sweepctl import analysis
from tests.campaign.helpers import cli, write_recipe

RECIPE = {
    "campaign": {"name": "nu-check", "entropy": "0x7e57_0000_0000_0000_0000_0000_0000_00a1"},
    "axes": {
        "widths": [4, 8, 16, 32],
        "couplings": {"start": -0.24, "stop": 0.24, "num": 9},
        "disorder": [{"p": 0.0}],
        "epsilon": [1e-6],
    },
    "precision": {"target": 0.008, "max_layers": 4_000_000},
    "replica": {
        "layers": 50_000,
        "warmup": "auto",
        "strips": 8,
        "initial": 2,
        "checkpoint_seconds": 120,
    },
}

#: [P1] tests/REFERENCES.md: ν_CC = 2.593 (N → ∞)
NU_CC = 2.593
#: [P9] tests/REFERENCES.md: classical percolation, ν = 4/3 (recalled); a band that does
#: not exclude it cannot tell the quantum Hall transition from percolation
NU_PERCOLATION = 4 / 3


@pytest.fixture(scope="module")
def clean_fit(tmp_path_factory):
    """The campaign (slow: ~5 minutes of CPU) and the default procedure on it."""
    tmp_path = tmp_path_factory.mktemp("nu")
    store = tmp_path / "store"
    proc = cli("run", write_recipe(tmp_path / "r.toml", RECIPE), "--store", store, timeout=3600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # The default procedure: scan orders up to 4,1,3,1 and every N_min in the duality-
    # symmetric form (the default at p_block = p_open), stable choice, branches, resampled
    # refit, fixed-y sensitivity, leading-order criterion.
    chosen = tmp_path / "chosen.json"
    proc = cli("fit", store, "--out", chosen)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    print(proc.stdout)
    return store, tmp_path, json.loads(chosen.read_text())


def _budget(res: dict) -> tuple[float, float]:
    """This campaign's own error budget, as the procedure reports it: the headline
    interval (statistical, every branch) joined with the range over every acceptable fit
    not ruled out (stable forms, fixed-y fits). It is fixed by the procedure, not by this
    test, and was set before the procedure was run on this campaign."""
    lo = min(res["nu_ci"][0], res["nu_range"][0])
    hi = max(res["nu_ci"][1], res["nu_range"][1])
    return lo, hi


@pytest.mark.slow
def test_clean_network_fit_is_acceptable_and_excludes_percolation(clean_fit):
    _, _, res = clean_fit
    assert res["acceptable"] and res["p_value"] >= 0.1, res  # [M5]: only p ≥ 0.1
    assert res["nu_ci"][0] <= res["nu"] <= res["nu_ci"][1]
    # [P9]: a budget that does not exclude 4/3 cannot tell this transition from
    # percolation. Before the leading-order criterion ([M8]) the fixed-y fits' lowest
    # minima, in which ψ0²ψ1 carries the x-dependence (ν = 0.68–1.60, measured
    # 2026-12-02), put the budget's lower end at 0.68.
    lo, hi = _budget(res)
    assert lo > NU_PERCOLATION, (lo, hi, res)
    for r in res["ruled_out"]:
        assert r["correction_share"] > 1.0, r  # [M8]: only such fits are ruled out


@pytest.mark.slow
def test_clean_network_data_are_self_dual(clean_fit):
    # [K7] tests/REFERENCES.md: at p_block = p_open the network is self-dual, Γ(N, x) =
    # Γ(N, −x) in distribution, so the stored pairs differ only by their errors. This
    # checks the kernel's numbers directly, without a scaling form (the general-form
    # refit below can move x_c on two widths for reasons of the fit).
    store, _, _ = clean_fit
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
    assert pairs == 16
    # a two-sided χ² test at the 0.1 % level (fixed before the run)
    p = stats.chi2.sf(chi2, pairs)
    assert 1e-3 < p < 1 - 1e-3, (chi2, pairs, p)


@pytest.mark.slow
@pytest.mark.xfail(
    strict=False,
    reason=(
        "known, open (measured 2026-12-03 with the CholeskyQR kernel): the general-form "
        "refit of the chosen orders at the chosen N_min (two widths, 16 and 32) gave an "
        "x_c interval ending at -0.031, excluding 0, while the data themselves are "
        "self-dual (chi2 = 19.3 for 16 pairs x, -x; test above): a matter of the fit on "
        "two widths, not of the kernel"
    ),
)
def test_clean_network_general_refit_puts_x_c_at_zero(clean_fit):
    store, tmp_path, res = clean_fit
    # The same form refitted without the symmetry: x_c is free and must come out at 0.
    o = res["orders"]
    general = tmp_path / "general.json"
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
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    gen = json.loads(general.read_text())
    # [K7] tests/REFERENCES.md: self-duality at p_block = p_open puts x_c at 0
    assert gen["x_c_ci"][0] <= 0.0 <= gen["x_c_ci"][1], gen


@pytest.mark.slow
@pytest.mark.xfail(
    strict=True,
    reason=(
        "known, open (measured 2026-12-03): widths 4-32 at 0.3 % give the stable choice "
        "4,0,3,0 at N >= 16 (two widths), nu = 2.978 [2.680, 3.232]; fixed-y fits not "
        "ruled out span 2.688-2.926; the budget [2.680, 3.232] misses [P1]'s 2.593 while "
        "the effective exponent of widths 16, 32 is 2.415 +- 0.032: corrections at these "
        "widths are not resolved. A campaign to N = 64 costs ~4.7 CPU-hours (plan); band "
        "not widened"
    ),
)
def test_clean_network_nu_budget_holds_the_published_value(clean_fit):
    _, _, res = clean_fit
    lo, hi = _budget(res)
    assert lo <= NU_CC <= hi, (lo, hi, res)  # [P1] tests/REFERENCES.md
