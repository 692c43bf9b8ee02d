"""`sweepctl fit` on points tables: JSON fields, Dask resampling, and bad input."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from sweepctl.fss import Orders, fit
from sweepctl.fss.fit import GOF_ESTIMATED, GOF_EXACT
from sweepctl.fss.procedure import run
from tests.campaign.helpers import cli
from tests.fss import synthetic as syn


def _table(data, **extra) -> pd.DataFrame:
    df = pd.DataFrame(
        {"N": data.N.astype(int), "x": data.x, "Gamma": data.Gamma, "Gamma_err": data.Gamma_err}
    )
    for k, v in extra.items():
        df[k] = v
    return df


@pytest.fixture(scope="module")
def points_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("fitcli") / "points.csv"
    _table(syn.make(5)).to_csv(path, index=False)  # invented data (tests/fss/synthetic.py)
    return path


def test_fit_json_on_dask_matches_in_process_resampling(points_csv, tmp_path):
    out = tmp_path / "fit.json"
    proc = cli(
        "fit",
        points_csv,
        "--orders",
        "2,1,1,0",
        "--workers",
        "2",
        "--resamples",
        "100",
        "--seed",
        "4",
        "--out",
        out,
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    res = json.loads(out.read_text())
    for key in (
        "nu",
        "nu_ci",
        "y",
        "y_ci",
        "x_c",
        "x_c_ci",
        "Gamma_c",
        "Gamma_c_ci",
        "chi2",
        "dof",
        "p_value",
        "orders",
        "n_min",
        "points_used",
    ):
        assert key in res, key
    assert res["points_used"] == 55 and res["dof"] == 55 - 9 and res["n_min"] == 4
    assert res["orders"] == {"n_R": 2, "n_I": 1, "m_R": 1, "m_I": 0}
    # the CLI reports the library's fit of the same table (no n_strips column: errors are
    # taken as exact; the probability itself is checked in test_statistics.py)
    data = syn.make(5)
    best = fit(data, syn.GENERAL)
    assert best.gof_method == GOF_EXACT
    assert res["chi2"] == pytest.approx(best.chi2, rel=1e-9)
    assert res["p_value"] == pytest.approx(best.p_value, rel=1e-9)
    # the same seeds give the same intervals in this process, without Dask
    o = run(data, symmetric=False, orders=Orders(2, 1, 1, 0), resamples=100, seed=4)
    assert len(res["branches"]) == len(o.branches)
    for q in ("nu", "y", "x_c", "Gamma_c"):
        assert res[f"{q}_ci"] == pytest.approx(list(o.interval(q)), rel=1e-9), q
        assert res[f"{q}_ci"][0] <= res[q] <= res[f"{q}_ci"][1]
    assert "resampling" in proc.stdout


def test_fit_json_goes_alone_to_stdout_and_equals_the_out_file(points_csv, tmp_path):
    out = tmp_path / "fit.json"
    args = ("fit", points_csv, "--orders", "2,1,1,0", "--workers", "0", "--resamples", "20")
    proc = cli(*args, "--json", "--out", out)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    printed = json.loads(proc.stdout)  # one strict JSON document and nothing else on stdout
    assert printed == json.loads(out.read_text())
    assert printed["acceptable"] is True and printed["nu_ci"][0] < printed["nu_ci"][1]


def test_fit_reads_the_strip_count_column(tmp_path):
    # invented few-strip data (tests/fss/synthetic.py): with n_strips in the table the CLI
    # uses the estimated-variance probability ([S2] tests/REFERENCES.md), not chi2.sf
    data = syn.make_strips(8, 16)
    path = tmp_path / "strips.csv"
    _table(data, n_strips=16).to_csv(path, index=False)
    out = tmp_path / "fit.json"
    proc = cli(
        "fit", path, "--orders", "2,0,1,0", "--workers", "1", "--resamples", "20", "--out", out
    )
    # this data set's fit has p ≈ 0.06 (exit 3, "no acceptable form"): its one attempt
    # still carries the probability
    assert proc.returncode in (0, 3), proc.stdout + proc.stderr
    res = json.loads(out.read_text())
    p = res["p_value"] if res["acceptable"] else res["attempts"][0]["p_value"]
    best = fit(data, syn.CHEAP)
    exact = fit(syn.errors_as_exact(data), syn.CHEAP)
    assert best.gof_method == GOF_ESTIMATED
    assert p == pytest.approx(best.p_value, rel=1e-9)
    assert abs(best.p_value - exact.p_value) > 0.01, (best.p_value, exact.p_value)


def test_scan_marks_a_stable_choice(points_csv):
    proc = cli(
        "fit",
        points_csv,
        "--scan",
        "--max-orders",
        "2,1,2,0",
        "--workers",
        "1",
        "--resamples",
        "40",
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "stable choice" in proc.stdout and "◀" in proc.stdout
    assert "forms tried" in proc.stdout  # --scan prints every window


def _write(tmp_path, df: pd.DataFrame, name="bad.csv"):
    p = tmp_path / name
    df.to_csv(p, index=False)
    return p


def _bad_cases(tmp_path):
    good = _table(syn.make(5))
    few = _table(syn.make(5, widths=(4, 8, 16))).iloc[[0, 1, 11, 12, 22, 23]]
    two_widths = _table(syn.make(5, widths=(8, 16)))
    nan = good.copy()
    nan.loc[3, "Gamma"] = np.nan
    zero = good.copy()
    zero.loc[7, "Gamma_err"] = 0.0
    neg = good.copy()
    neg.loc[9, "Gamma_err"] = -1e-3
    text = good.copy().astype({"Gamma": str})
    text.loc[0, "Gamma"] = "abc"
    slices = pd.concat(
        [_table(syn.make(5), p_block=0.0, p_open=0.0), _table(syn.make(6), p_block=0.1, p_open=0.1)]
    )
    (tmp_path / "empty").mkdir()
    (tmp_path / "t.txt").write_text("N x\n")
    (tmp_path / "a-file").write_text("")  # a path through a file cannot be created, even as root
    return {
        "unwritable --out": (
            [_write(tmp_path, good, "g.csv"), "--out", tmp_path / "a-file" / "fit.json"],
            "--out: cannot write",
        ),
        "--out is a directory": ([_write(tmp_path, good, "g.csv"), "--out", tmp_path], "--out"),
        "missing column": ([_write(tmp_path, good.drop(columns="Gamma_err"))], "Gamma_err"),
        "zero error": ([_write(tmp_path, zero, "zero.csv")], "Gamma_err = 0"),
        "negative error": ([_write(tmp_path, neg, "neg.csv")], "Gamma_err = -0.001"),
        "NaN Gamma": ([_write(tmp_path, nan, "nan.csv")], "Gamma is not a finite"),
        "not numeric": ([_write(tmp_path, text, "text.csv")], "not numeric"),
        "fewer points than parameters": (
            [_write(tmp_path, few, "few.csv"), "--orders", "2,1,1,0"],
            "points_used = 6",
        ),
        "two widths with irrelevant field": (
            [_write(tmp_path, two_widths, "two.csv"), "--orders", "2,1,1,0"],
            "at least 3 widths",
        ),
        "no such file": ([tmp_path / "nothere.csv"], "no such file"),
        "not a store": ([tmp_path / "empty"], "not a store"),
        "unknown table type": ([tmp_path / "t.txt"], "unknown table type"),
        "bad orders": ([_write(tmp_path, good, "g.csv"), "--orders", "2,1"], "--orders"),
        "orders below range": (
            [_write(tmp_path, good, "g.csv"), "--orders", "0,1,1,0"],
            "n_R >= 1",
        ),
        "ambiguous slice": ([_write(tmp_path, slices, "sl.csv")], "--disorder"),
        "absent slice": (
            [_write(tmp_path, slices, "sl.csv"), "--disorder", "0.2,0.2"],
            "not in the table",
        ),
        "n-min not a width": ([_write(tmp_path, good, "g.csv"), "--n-min", "5"], "--n-min 5"),
        "bad correction": (
            [_write(tmp_path, good, "g.csv"), "--correction", "exp"],
            "--correction",
        ),
        "symmetric on asymmetric": (
            [
                _write(tmp_path, _table(syn.make(5), p_block=0.2, p_open=0.1), "asym.csv"),
                "--symmetric",
            ],
            "not self-dual",
        ),
    }


CASES = [
    "unwritable --out",
    "--out is a directory",
    "missing column",
    "zero error",
    "negative error",
    "NaN Gamma",
    "not numeric",
    "fewer points than parameters",
    "two widths with irrelevant field",
    "no such file",
    "not a store",
    "unknown table type",
    "bad orders",
    "orders below range",
    "ambiguous slice",
    "absent slice",
    "n-min not a width",
    "bad correction",
    "symmetric on asymmetric",
]


@pytest.mark.parametrize("case", CASES)
def test_bad_input_is_one_clear_line(case, tmp_path):
    args, needle = _bad_cases(tmp_path)[case]
    proc = cli("fit", *args, "--workers", "0", "--resamples", "20")
    assert proc.returncode == 2, proc.stdout + proc.stderr
    err = proc.stderr.strip()
    assert "Traceback" not in proc.stderr + proc.stdout
    assert len(err.splitlines()) == 1, err
    assert err.startswith("error:") and needle in err, err
