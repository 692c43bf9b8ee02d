"""Measure how small ε the kernel handles: kernel vs the long-double reference, same draws.

Not collected by pytest (minutes per ε). Run from the repository root::

    python -m tests.kernel.measure_epsilon_bound --strips 32 --layers 100000

For each ε it prints the kernel's and the reference's Γ ± standard error (spread across
strips), their unpaired difference in combined σ, and the paired per-strip difference
(kernel − reference on the same disorder realisation) with its own standard error.
``--double`` also runs the reference algorithm in float64 (Gram–Schmidt after every
column, accurate node coefficients), which separates the loss of precision in the frame
from the kernel's rounded node table.

Measured here (N = 4, x = 0, p = 1/3, 32 strips × 100 000 layers, seed 101; the same
strips at every ε, so the rows are correlated):

    ε        2θ     kernel Γ          reference Γ       unpaired   paired d = kernel − ref
    1e-6     29.02  3.52444 ± 0.0064  3.52446 ± 0.0064  −0.003σ    −2.5e-5 ± 1.0e-5 (−2.4σ)
    3e-7     31.43  3.75937 ± 0.0070  3.75943 ± 0.0070  −0.006σ    −6.0e-5 ± 2.3e-5 (−2.6σ)
    1e-7     33.62  3.97376 ± 0.0075  3.97383 ± 0.0075  −0.007σ    −7.8e-5 ± 2.9e-5 (−2.6σ)
    4.5e-8   35.22  4.12953 ± 0.0079  4.12967 ± 0.0079  −0.012σ    −1.3e-4 ± 3.3e-5 (−4.0σ)
    1e-8     38.23  4.41725 ± 0.0086  4.42319 ± 0.0086  −0.49σ     −5.9e-3 ± 1.4e-4 (−42σ)
    1e-9     42.83  4.76685 ± 0.0096  4.87253 ± 0.0097  −7.7σ      −0.1057 ± 6.5e-4 (−162σ)

float64 run of the reference algorithm minus the reference: −3.3e-5 ± 2.3e-5 at 4.5e-8,
−0.051 ± 4.5e-4 at 1e-9 (half the kernel's deficit there; the rest is its node table,
in which cosh θ and sinh θ round to the same double at ε = 1e-9).
"""

from __future__ import annotations

import argparse
import json
import math
import time

import numpy as np

from sweepctl.kernel import LOG_COND_BUDGET, NetworkModel, StripState, default_warmup
from tests.kernel.longdouble_reference import reference_exponents


def _mean_err(a: np.ndarray) -> tuple[float, float]:
    return float(a.mean()), float(a.std(ddof=1) / math.sqrt(a.size))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--width", type=int, default=4)
    ap.add_argument("--strips", type=int, default=32)
    ap.add_argument("--layers", type=int, default=100_000)
    ap.add_argument("--seed", type=int, default=101)
    ap.add_argument("--eps", default="1e-6,3e-7,1e-7,1e-8,1e-9")
    ap.add_argument("--double", default="", help="ε values to also run in float64")
    ap.add_argument("--json", default="")
    a = ap.parse_args()
    n, rows = a.width, []
    warm = default_warmup(n)
    doubles = {float(e) for e in a.double.split(",") if e}
    for eps in (float(e) for e in a.eps.split(",")):
        model = NetworkModel(n, 0.0, p_block=1 / 3, p_open=1 / 3, epsilon=eps)
        t0 = time.perf_counter()
        res = StripState.start(model, strips=a.strips, seed=a.seed).advance(warm + a.layers)
        gk = res.result().Gamma_strips
        t1 = time.perf_counter()
        kw = dict(strips=a.strips, seed=a.seed, warmup=warm, layers=a.layers)
        gr = n * reference_exponents(model, **kw)[:, n - 1]
        t2 = time.perf_counter()
        row = {
            "eps": eps,
            "two_theta": 2 * math.acosh(1 / eps),
            "budget": LOG_COND_BUDGET,
            "kernel": _mean_err(gk),
            "reference": _mean_err(gr),
            "paired": _mean_err(gk - gr),
            "seconds": [t1 - t0, t2 - t1],
        }
        row["unpaired_sigma"] = (row["kernel"][0] - row["reference"][0]) / math.hypot(
            row["kernel"][1], row["reference"][1]
        )
        row["paired_sigma"] = row["paired"][0] / row["paired"][1]
        if eps in doubles:
            g64 = n * reference_exponents(model, real=np.float64, **kw)[:, n - 1]
            row["double_minus_reference"] = _mean_err(g64 - gr)
        rows.append(row)
        print(json.dumps(row), flush=True)
    if a.json:
        with open(a.json, "w") as fh:
            json.dump(rows, fh, indent=1)


if __name__ == "__main__":
    main()
