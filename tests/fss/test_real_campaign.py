"""ν of the clean-coupling network from a real small campaign (slow: ~2 minutes on 2 cores)."""

from __future__ import annotations

import json

import pytest

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


@pytest.mark.slow
@pytest.mark.xfail(
    reason=(
        "known, open (measured 2026-12-02 with the default procedure): stable choice "
        "4,0,3,0 at N >= 16, nu = 2.978 [2.680, 3.233], p = 0.18, no free y; all 16 fits "
        "with y fixed (-2..-0.1) are acceptable but their lowest minimum is the branch in "
        "which psi0^2 psi1 plays the relevant field (nu = 0.68-1.60), so the error budget "
        "[0.68, 3.23] holds [P1] yet does not exclude percolation's 4/3 ([P9]); a physics "
        "criterion against that branch is not implemented; band not widened"
    ),
    strict=False,
)
def test_clean_network_nu_in_published_band(tmp_path):
    store = tmp_path / "store"
    proc = cli("run", write_recipe(tmp_path / "r.toml", RECIPE), "--store", store, timeout=3600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # The default procedure: scan orders up to 4,1,3,1 and every N_min in the duality-
    # symmetric form (the default at p_block = p_open), stable choice, branches, resampled
    # refit, fixed-y sensitivity.
    chosen = tmp_path / "chosen.json"
    proc = cli("fit", store, "--out", chosen)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    res = json.loads(chosen.read_text())
    print(proc.stdout)
    assert res["acceptable"] and res["p_value"] >= 0.1, res  # [M5]: only p ≥ 0.1
    assert res["nu_ci"][0] <= res["nu"] <= res["nu_ci"][1]
    # The band is this campaign's own error budget, as the procedure reports it: the
    # headline interval (statistical, every branch) joined with the range over every
    # acceptable fit (stable forms, fixed-y fits). It is fixed by the procedure, not by
    # this test, and was set before the procedure was run on this campaign. [P1] must
    # lie inside, and the band must exclude percolation's 4/3 ([P9]) to mean anything.
    lo = min(res["nu_ci"][0], res["nu_range"][0])
    hi = max(res["nu_ci"][1], res["nu_range"][1])
    assert lo <= NU_CC <= hi, (lo, hi, res)
    assert lo > NU_PERCOLATION, (lo, hi, res)
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
