"""`sweepctl bench` as a user runs it: a real subprocess, a real JSON file."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest


def run_cli(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "sweepctl", *args],
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def test_bench_prints_table_and_writes_calibration(tmp_path):
    out = tmp_path / "cal.json"
    proc = run_cli(
        "bench", "--widths", "2,4", "--strips", "2", "--seconds", "0.1", "--out", str(out)
    )
    assert proc.returncode == 0, proc.stderr
    assert "GFLOP/s" in proc.stdout and "zgemm" in proc.stdout
    data = json.loads(out.read_text())
    assert data["kind"] == "sweepctl-kernel-calibration"
    assert [w["width"] for w in data["widths"]] == [2, 4]
    for row in data["widths"]:
        assert row["layers"] > 0 and row["strip_layers_per_second"] > 0
        assert row["strip_layers_per_second"] == pytest.approx(row["layers_per_second"] * 2)
        # derived: at x = 0, p = 0 the growth bound allows 16 columns (8 layers) per QR
        assert 0.1 <= row["qr_per_layer"] <= 0.2
    assert data["zgemm_gflops"] > 0


def test_bench_bad_widths_one_line_no_traceback():
    proc = run_cli("bench", "--widths", "4,abc")
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "--widths" in proc.stderr and "4,abc" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_bench_rejects_zero_strips():
    proc = run_cli("bench", "--strips", "0")
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "--strips" in proc.stderr


def test_bench_unwritable_out(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory")
    target = blocker / "cal.json"
    proc = run_cli(
        "bench", "--widths", "2", "--strips", "2", "--seconds", "0.05", "--out", str(target)
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert "--out" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1


def test_bench_json_is_the_calibration_on_stdout():
    proc = run_cli("bench", "--widths", "2", "--strips", "2", "--seconds", "0.05", "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)  # the whole of stdout is one JSON document
    assert data["kind"] == "sweepctl-kernel-calibration"
