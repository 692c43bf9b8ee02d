"""Does ``sweepctl plan`` price a point as a campaign then spends it? (cost model check)

Run: ``python tests/benchmarks/bench_cost.py [--seconds 4] [--workers 2]``. For each
disorder p (p_block = p_open = p) in {0, 0.1, 1/3} and width N in {8, 32, 64}: one point
at x = 0, 4 replicas of 16 strips (the 64 strip values exceed the 51 an error bar needs),
replica length chosen for about ``--seconds`` of CPU each; the target is out of reach
and the cap is exactly 4 replicas, so the campaign's replica count is known and the table
checks the price per replica, which is what the cost model predicts. (How many replicas a
precision target needs is the error model's guess, a separate matter.)

Prints, per case: QRs per layer of the schedule, the plan's CPU estimate, the CPU the
campaign used (sum of the replicas' process time, warm-up included), and their ratio;
the issue's requirement is every ratio within 30 %.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import pandas as pd

CASES = [(p, n) for p in (0.0, 0.1, 1 / 3) for n in (8, 32, 64)]
STRIPS, REPLICAS = 16, 4


def sweepctl(*args: str) -> str:
    proc = subprocess.run(
        [sys.executable, "-m", "sweepctl", *map(str, args)], capture_output=True, text=True
    )
    if proc.returncode != 0:
        raise SystemExit(f"sweepctl {' '.join(map(str, args))} failed:\n{proc.stderr}")
    return proc.stdout


def recipe(p: float, n: int, layers: int) -> str:
    return f"""
[campaign]
name = "cost-check"
[axes]
widths = [{n}]
couplings = [0.0]
disorder = [{{ p = {p!r} }}]
epsilon = [1e-6]
[precision]
target = 1e-6
max_layers = {REPLICAS * layers}
[replica]
layers = {layers}
warmup = 32
strips = {STRIPS}
initial = {REPLICAS}
checkpoint_seconds = 1e6
"""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=4.0, help="CPU seconds per replica")
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    from sweepctl.campaign.cost import CostModel
    from sweepctl.campaign.recipe import Point

    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        cal = d / "calibration.json"
        print("calibrating (sweepctl bench) …", flush=True)
        sweepctl("bench", "--widths", "8,32,64", "--seconds", "1", "--out", cal)
        cost = CostModel(json.loads(cal.read_text())["widths"])
        rows = []
        for p, n in CASES:
            pt = Point(float(f"{p:.12g}"), float(f"{p:.12g}"), 1e-6, n, 0.0)
            per = cost.point_seconds(pt, STRIPS) * STRIPS
            layers = max(64, int(args.seconds / per))
            r = d / f"p{p:.3f}-N{n}.toml"
            r.write_text(recipe(float(f"{p:.12g}"), n, layers))
            plan = json.loads(sweepctl("plan", r, "--json", "--calibration", cal))
            (pp,) = plan["per_point"]
            assert pp["expected_replicas"] == REPLICAS, pp
            store = d / f"store-{p:.3f}-{n}"
            sweepctl("run", r, "--store", store, "--workers", args.workers, "--calibration", cal)
            sweepctl("merge", store)
            used = float(pd.read_parquet(store / "merged" / "points.parquet")["cpu_hours"].sum())
            row = {
                "p": f"{p:.3g}",
                "N": n,
                "layers": layers,
                "QR/layer": round(pp["qr_per_layer"], 3),
                "plan CPU s": round(3600 * pp["cpu_hours"], 1),
                "used CPU s": round(3600 * used, 1),
                "used/plan": round(used / pp["cpu_hours"], 3),
            }
            rows.append(row)
            print(row, flush=True)
    df = pd.DataFrame(rows)
    print()
    print(df.to_markdown(index=False) if _has_tabulate() else df.to_string(index=False))
    worst = float((df["used/plan"] - 1).abs().max())
    print(f"\nworst deviation {worst:.1%} (requirement: within 30 %)")


def _has_tabulate() -> bool:
    try:
        import tabulate  # noqa: F401
    except ImportError:
        return False
    return True


if __name__ == "__main__":
    main()
