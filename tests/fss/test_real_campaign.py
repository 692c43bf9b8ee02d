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

#: [P1] tests/REFERENCES.md ν = 2.593 ± 0.3 for widths 4–32 (see the test)
NU_BAND = (2.3, 2.9)


@pytest.mark.slow
@pytest.mark.xfail(
    reason=(
        "known, open: with 51-strip error bars the scan's stable choice on widths 4-32 gives "
        "nu = 2.98 [2.70, 3.24] (measured 2026-12-02), above the [P1] band; the fit "
        "procedure is being reworked (branches, correction sensitivity) and the band is "
        "not widened"
    ),
    strict=False,
)
def test_clean_network_nu_in_published_band(tmp_path):
    store = tmp_path / "store"
    proc = cli("run", write_recipe(tmp_path / "r.toml", RECIPE), "--store", store, timeout=3600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # The practitioner's procedure: scan orders and N_min in the duality-symmetric form
    # (the default at p_block = p_open) and take the stable choice.
    chosen = tmp_path / "chosen.json"
    proc = cli("fit", store, "--scan", "--max-orders", "4,1,3,1", "--json", chosen)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    res = json.loads(chosen.read_text())
    # [P1] tests/REFERENCES.md: ν = 2.593 [2.587, 2.598] (N → ∞). The band is fixed from
    # that source, not from this campaign's output: widths 4–32 are modest, so [P1] ± 0.3,
    # i.e. [2.3, 2.9], is asked of the fit. It was set before this campaign was first run
    # and must not be widened to make a run pass; a failure means the fit or the kernel
    # is wrong, or the widths are too small for the form chosen.
    assert NU_BAND[0] <= res["nu"] <= NU_BAND[1], res
    assert res["nu_ci"][0] < res["nu"] < res["nu_ci"][1]
    assert res["p_value"] >= 0.1, res  # [M5]: the scan accepts only p ≥ 0.1
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
        "--json",
        general,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    gen = json.loads(general.read_text())
    # [K7] tests/REFERENCES.md: self-duality at p_block = p_open puts x_c at 0
    assert gen["x_c_ci"][0] <= 0.0 <= gen["x_c_ci"][1], gen
    assert NU_BAND[0] <= gen["nu"] <= NU_BAND[1], gen  # [P1], the band above
