"""Measure the network kernel's strip-to-strip variance of Γ (the rehearsal model's noise).

For each (N, x) it runs ``--strips`` independent strips of ``--layers`` measured layers
and prints Γ, the sample variance s² of the per-strip Γ, its standard error (from the
fourth moment) and ``k = s²·L/(N·Γ)``: the constant of the law Var Γ_strip = k·N·Γ/L
([M3] tests/REFERENCES.md writes the same law as a relative error √(c·N/(Γ·L))). A
constant ``k`` across widths and couplings, where ``s²·L/(N·Γ²)`` drifts, selects the
law. Run: ``python tests/benchmarks/measure_strip_noise.py``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from sweepctl.kernel import lyapunov_spectrum


def measure(width: int, x: float, layers: int, strips: int, seed: int) -> dict:
    t0 = time.process_time()
    r = lyapunov_spectrum(width, x, layers, strips=strips, seed=seed)
    g = np.asarray(r.Gamma_strips)
    s2 = float(np.var(g, ddof=1))
    m4 = float(np.mean((g - g.mean()) ** 4))
    se_s2 = float(np.sqrt(max(m4 - s2**2, 0.0) / g.size))
    gam = float(g.mean())
    return {
        "N": width,
        "x": x,
        "L": layers,
        "strips": strips,
        "Gamma": gam,
        "s2": s2,
        "se_s2": se_s2,
        "k": s2 * layers / (width * gam),
        "k_err": se_s2 * layers / (width * gam),
        "k2": s2 * layers / (width * gam**2),
        "cpu": time.process_time() - t0,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--widths", default="4,8,16")
    ap.add_argument("--couplings", default="0,0.2,0.5")
    ap.add_argument("--layers", type=int, default=2000)
    ap.add_argument("--strips", type=int, default=200)
    ap.add_argument("--seed", type=int, default=20261202)
    a = ap.parse_args()
    print(
        f"{'N':>3} {'x':>5} {'L':>6} {'S':>5} {'Gamma':>8} {'k=s2L/(NG)':>16} "
        f"{'s2L/(NG^2)':>11} {'cpu s':>6}"
    )
    for n in map(int, a.widths.split(",")):
        for x in map(float, a.couplings.split(",")):
            m = measure(n, x, a.layers, a.strips, a.seed)
            print(
                f"{m['N']:>3} {m['x']:>5g} {m['L']:>6} {m['strips']:>5} {m['Gamma']:>8.4f} "
                f"{m['k']:>8.4f} ± {m['k_err']:.4f} {m['k2']:>11.4f} {m['cpu']:>6.1f}"
            )


if __name__ == "__main__":
    main()
