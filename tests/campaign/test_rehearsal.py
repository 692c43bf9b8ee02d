"""The rehearsal model: a known law through the real driver, store and Dask workers."""

from __future__ import annotations

import json
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import stats

from sweepctl.bench import CALIBRATION_FORMAT
from sweepctl.campaign.plan import replica_seed
from sweepctl.campaign.recipe import Point, RecipeError, parse_recipe
from sweepctl.kernel import lyapunov_spectrum
from sweepctl.kernel.rehearsal import RehearsalModel
from tests.campaign.helpers import (
    BASE,
    assert_row_recomputes,
    cli,
    events,
    merged,
    snapshot,
    write_recipe,
)

LAW = {
    "kind": "rehearsal",
    "nu": 2.6,
    "y": -0.5,
    "Gamma_c": 0.8,
    "x_c": 0.02,
    "F": [0.1, 0.85],
    "correction": 0.15,
}
REHEARSAL = {
    "axes": {"widths": [4, 8, 16], "couplings": [-0.2, -0.1, 0.0, 0.1, 0.2]},
    # 15 points x 36 replicas in the first round, N = 16 needs a second one
    "precision": {"target": 0.004, "max_layers": None},
    "replica": {"layers": 2000, "warmup": 32, "strips": 13, "initial": 36},
    "model": LAW,
}
#: a hand-made calibration: column cost c(N) = 1e-5 (N/4)^2 s per strip-layer, QR ~ 0
#: (large enough that the real CPU of a rehearsal replica, a few ms, stays below its price)
CAL_WIDTHS = (4, 8, 16)


def _law() -> RehearsalModel:
    return RehearsalModel.from_dict(LAW)


def _calibration(path, column: float = 1e-5, power: float = 2.0):
    """A calibration file pricing a column at ``column`` × (N/4)^power seconds (10× that
    with disorder) and QRs at nothing."""
    rows = [
        {
            "width": n,
            "column_seconds": column * (n / 4) ** power,
            "column_seconds_disorder": 10 * column * (n / 4) ** power,
            "qr_seconds": 1e-30,
        }
        for n in CAL_WIDTHS
    ]
    path.write_text(
        json.dumps(
            {"kind": "sweepctl-kernel-calibration", "format": CALIBRATION_FORMAT, "widths": rows}
        )
    )
    return path


def _rows(store) -> list[dict]:
    return sorted(
        (
            r
            for p in sorted((store / "replicas").glob("part-*.parquet"))
            for r in pq.read_table(p).to_pylist()
        ),
        key=lambda r: (r["point_key"], r["replica"]),
    )


@pytest.fixture(scope="module")
def rehearsal_store(tmp_path_factory):
    d = tmp_path_factory.mktemp("rehearsal")
    recipe = write_recipe(d / "recipe.toml", REHEARSAL)
    cal = _calibration(d / "cal.json")
    # one worker here; two in the interrupted run that must store the same replicas
    proc = cli("run", recipe, "--store", d / "store", "--workers", "1", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return d


def test_strip_noise_matches_the_network_kernel():
    # N = 4, x = 0.1, a seed not used in the measurement of the constant ([R1])
    n, x, layers = 4, 0.1, 1000
    real = np.asarray(lyapunov_spectrum(n, x, layers, strips=600, seed=99).Gamma_strips)
    law = RehearsalModel(nu=1.0, Gamma_c=float(real.mean()), F=(0.0,))
    fake = law.strip_gammas(n, 0.0, layers, 20_000, np.random.SeedSequence(5))

    def log_var_and_se(g):
        s2 = np.var(g, ddof=1)
        m4 = np.mean((g - g.mean()) ** 4)
        return math.log(s2), math.sqrt((m4 - s2**2) / g.size) / s2

    a, sa = log_var_and_se(real)
    b, sb = log_var_and_se(fake)
    # derived: 4 sigma of the log variance ratio, sigma from each sample's fourth moment
    assert abs(a - b) < 4 * math.hypot(sa, sb), (math.exp(a), math.exp(b))


def test_campaign_recovers_the_law_within_its_error_bars(rehearsal_store):
    df = merged(rehearsal_store / "store")
    law = _law()
    truth = np.array([law.Gamma(int(n), x) for n, x in zip(df["N"], df["x"], strict=True)])
    z = (df["Gamma"].to_numpy() - truth) / df["Gamma_err"].to_numpy()
    # derived: each z is Student t with n_strips - 1 >= 50 dof ([S2]); 4 sigma per point
    assert np.all(np.abs(z) < 4), z
    # the error bars are right, not only wide: chi^2 two-sided at 1e-4, the upper bound
    # widened by the t variance (n - 1)/(n - 3) ([S2] tests/REFERENCES.md)
    k, nmin = len(z), int(df["n_strips"].min())
    chi2 = float(np.sum(z**2))
    assert stats.chi2.ppf(1e-4, k) < chi2 < stats.chi2.ppf(1 - 1e-4, k) * (nmin - 1) / (nmin - 3)


def test_rows_charge_the_kernel_cost_and_keep_the_real_cpu(rehearsal_store):
    rows = _rows(rehearsal_store / "store")
    assert rows
    for r in rows:
        # derived from the hand-made calibration: c(N) * strips * (layers + warmup)
        want = 1e-5 * (r["width"] / 4) ** 2 * r["strips"] * (r["layers"] + r["warmup"])
        assert r["cpu_seconds"] == pytest.approx(want, rel=1e-9)
        assert r["wall_seconds"] == pytest.approx(want, rel=1e-9)
        assert 0 <= r["real_cpu_seconds"] < r["cpu_seconds"]
        assert json.loads(r["model"]) == {"noise": 1.0, **LAW}
        assert r["resumed_at_layer"] == 0 and r["exponents"] == []
    campaign = json.loads((rehearsal_store / "store" / "campaign.json").read_text())
    assert campaign["frozen"]["model"] == {"noise": 1.0, **LAW}
    assert campaign["recipe_history"][-1]["recipe"]["model"] == {"noise": 1.0, **LAW}
    # merge sums the virtual seconds, as for a real campaign
    df = merged(rehearsal_store / "store", drop_timing=False)
    assert df["cpu_hours"].sum() == pytest.approx(sum(r["cpu_seconds"] for r in rows) / 3600)


def test_replicas_use_the_network_seeds_and_recompute_bit_identically(rehearsal_store):
    rows = _rows(rehearsal_store / "store")
    entropy = int(BASE["campaign"]["entropy"].replace("_", ""), 16)
    for r in rows[:: max(1, len(rows) // 10)]:
        p = Point(r["p_block"], r["p_open"], r["epsilon"], r["width"], r["x"])
        seed = replica_seed(entropy, p, r["replica"])
        assert tuple(r["spawn_key"]) == seed.spawn_key
        # the strips' normals are the first draws of that seed's PCG64 stream
        law = _law()
        z = (np.asarray(r["gamma_strips"]) - law.Gamma(p.width, p.x)) / law.strip_sigma(
            p.width, p.x, r["layers"]
        )
        drawn = np.random.Generator(np.random.PCG64(seed)).standard_normal(r["strips"])
        np.testing.assert_allclose(z, drawn, rtol=0, atol=1e-9)
        assert_row_recomputes(r)
    proc = cli("audit", rehearsal_store / "store", "--recompute", "5", "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_two_workers_and_an_interrupt_give_the_same_replicas(rehearsal_store, tmp_path):
    want = [
        (r["point_key"], r["replica"], r["gamma_strips"]) for r in _rows(rehearsal_store / "store")
    ]
    assert len(want) > 500  # the first round alone exceeds one 500-row flush
    recipe = write_recipe(tmp_path / "recipe.toml", REHEARSAL)
    cal = _calibration(tmp_path / "cal.json")
    # the driver stops itself (SIGTERM) right after its first 500-row flush, mid-round
    cut = tmp_path / "cut"
    fault = {"SWEEPCTL_FAULT": "signal-in-flush"}
    proc = cli("run", recipe, "--store", cut, "--workers", "2", "--calibration", cal, env=fault)
    assert proc.returncode == 130, proc.stdout + proc.stderr
    assert events(cut)[-1]["event"] == "interrupted"
    assert 0 < len(_rows(cut)) < len(want)
    proc = cli("run", recipe, "--store", cut, "--workers", "2", "--calibration", cal)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert [(r["point_key"], r["replica"], r["gamma_strips"]) for r in _rows(cut)] == want


@pytest.mark.parametrize(
    ("change", "field", "shown"),
    [
        ({"nu": 2.4}, "model.nu", "2.4"),
        (
            {
                "kind": None,
                "nu": None,
                "y": None,
                "Gamma_c": None,
                "x_c": None,
                "F": None,
                "correction": None,
            },
            "model.kind",
            '"network"',
        ),
        ({"noise": 2.0}, "model.noise", "2.0"),
    ],
)
def test_changing_the_model_of_a_store_is_refused(rehearsal_store, tmp_path, change, field, shown):
    store = rehearsal_store / "store"
    before = snapshot(store)
    model = {k: v for k, v in {**LAW, **change}.items() if v is not None}
    recipe = write_recipe(tmp_path / "r.toml", {**REHEARSAL, "model": model or {"kind": "network"}})
    for cmd in (("run", recipe, "--store", store), ("plan", recipe, "--store", store)):
        proc = cli(*cmd)
        assert proc.returncode == 2, proc.stdout + proc.stderr
        line = proc.stderr.strip()
        assert len(line.splitlines()) == 1 and "Traceback" not in line
        assert f"{field} = {shown}" in line and "the store was made with" in line, line
        assert "new store" in line
    assert snapshot(store) == before


def _parse(model: dict):
    data = json.loads(json.dumps(BASE))
    data["campaign"]["entropy"] = 0x1234
    data["model"] = model
    return parse_recipe(data, "r.toml")


@pytest.mark.parametrize(
    ("model", "field", "fix"),
    [
        ({"kind": "toy"}, "model.kind", 'kind = "network"'),
        ({"nu": 2.6}, "model.nu", 'applies to kind = "rehearsal" only'),
        ({"kind": "rehearsal", "Gamma_c": 0.8, "F": [0.5]}, "model.nu", "add nu = 2.6"),
        ({**LAW, "nu": 0.0}, "model.nu", "0.2 <= nu <= 10"),
        ({**LAW, "nu": "2.6"}, "model.nu", "0.2 <= nu <= 10"),
        ({**LAW, "y": 0.3}, "model.y", "-5 <= y < 0"),
        ({**LAW, "Gamma_c": 0.0}, "model.Gamma_c", "0 < Gamma_c <= 10"),
        ({**LAW, "noise": 0.0}, "model.noise", "0 < noise <= 100"),
        ({**LAW, "F": []}, "model.F", "1 to 8 numbers"),
        ({**LAW, "F": [0.0, 0.0]}, "model.F", "all zero"),
        ({**LAW, "F": [0.5, "x"]}, "model.F[1]", "1 to 8 numbers"),
        ({k: v for k, v in LAW.items() if k != "y"}, "model.y", "needs its exponent"),
        ({**LAW, "F": [-5.0]}, "model.F", "Gamma (N times the smallest positive exponent)"),
        ({**LAW, "speed": 1}, "model.speed", "unknown key"),
    ],
)
def test_bad_model_parameters(model, field, fix):
    with pytest.raises(RecipeError) as e:
        _parse(model)
    assert e.value.field == field
    assert fix in str(e.value) and str(e.value).startswith(f"r.toml: {field}")


def test_a_bad_model_parameter_through_the_cli(tmp_path):
    proc = cli("plan", write_recipe(tmp_path / "r.toml", {**REHEARSAL, "model": {**LAW, "nu": -1}}))
    assert proc.returncode == 2
    assert proc.stderr.strip().endswith(
        "model.nu = -1: the localisation-length exponent must "
        "satisfy 0.2 <= nu <= 10, e.g. nu = 2.6"
    ), proc.stderr
