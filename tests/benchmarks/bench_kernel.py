"""Kernel vs the plain NumPy peer (``baseline_numpy.py``): same model, strips and layers.

Run: ``python tests/benchmarks/bench_kernel.py [--repeats 5] [--layers-scale F]``.

Prints one table: per case the median process-CPU seconds of the kernel and of the
peer over interleaved repeats (kernel, peer, kernel, peer, …), their ratio, the QRs per
layer each does, the kernel's share of strip-QRs where the CholeskyQR certificate failed
and Householder redid it (last repeat), and both Γ with their standard errors (the same
layers and strips give the same statistical error; the two Γ agree within it, different
streams).

Conditions (issue 11): 8 strips, no warm-up layers on either side, x = 0, one BLAS
thread. The thread limit is set through the environment *before* NumPy or SciPy are
imported, so every BLAS the process loads (NumPy's and SciPy's OpenBLAS) starts with one
thread. Times are process CPU time: other sessions share the cores, and CPU time is what
a replica is charged. The kernel's compiled code is loaded (from numba's cache) by one
small untimed call before the table; nothing else runs untimed.

Targets: clean N = 8 ≥ 6×, N = 64 ≥ 3×, N = 256 ≥ 3×; p_block = p_open = 1/3,
ε = 1e-6 ≥ 2× at N = 16 and ≥ 1.5× (goal 2×) at N = 64, the peer doing a QR after
every column there.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import math  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from baseline_numpy import QR_EVERY, baseline_spectrum  # noqa: E402

from sweepctl.kernel import NetworkModel, StripState  # noqa: E402

STRIPS = 8
EPS = 1e-6
#: (label, N, p, layers): layers sized for about a second of the peer each.
CASES = [
    ("clean", 8, 0.0, 20_000),
    ("clean", 64, 0.0, 1_000),
    ("clean", 256, 0.0, 40),
    ("p=1/3", 16, 1 / 3, 3_000),
    ("p=1/3", 64, 1 / 3, 200),
]
TARGETS = {
    ("clean", 8): 6.0,
    ("clean", 64): 3.0,
    ("clean", 256): 3.0,
    ("p=1/3", 16): 2.0,
    ("p=1/3", 64): 1.5,
}


def gamma_of(exponents: np.ndarray, n: int) -> tuple[float, float]:
    g = n * exponents[:, n - 1]
    return float(g.mean()), float(g.std(ddof=1) / math.sqrt(g.size))


def run_kernel(n: int, p: float, layers: int, seed: int, cholesky: bool = True):
    model = NetworkModel(n, 0.0, p, p, EPS)
    st = StripState.start(model, strips=STRIPS, seed=seed, warmup=0, cholesky=cholesky)
    t0 = time.process_time()
    st.advance(layers)
    res = st.result()
    fb = float(st.fallbacks[0]) / max(1, st.reorthogonalisations * STRIPS)
    return time.process_time() - t0, res.exponents, (st.reorthogonalisations + 1) / layers, fb


def run_peer(n: int, p: float, layers: int, seed: int):
    t0 = time.process_time()
    ex = baseline_spectrum(
        n, 0.0, layers, strips=STRIPS, seed=seed, p_block=p, p_open=p, epsilon=EPS
    )
    qr = 2.0 if p > 0 else 1.0 / QR_EVERY
    return time.process_time() - t0, ex, qr


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--layers-scale", type=float, default=1.0)
    ap.add_argument("--repeats", type=int, default=3, help="interleaved runs of each (median)")
    ap.add_argument("--only", default="", help="comma-separated case indices (default all)")
    ap.add_argument(
        "--householder",
        action="store_true",
        help="kernel with Householder QRs only (the method before CholeskyQR; for comparison)",
    )
    args = ap.parse_args()
    StripState.start(NetworkModel(4, 0.0, 0.3, 0.3), strips=2, warmup=0).advance(4).result()
    cases = CASES
    if args.only:
        cases = [CASES[int(i)] for i in args.only.split(",")]
    print(
        f"{STRIPS} strips, x = 0, no warm-up, one BLAS thread, ε = {EPS:g}, "
        f"median of {args.repeats} interleaved runs, process CPU seconds"
        + (", kernel with Householder QRs only" if args.householder else "")
    )
    print(
        f"{'case':>6} {'N':>4} {'layers':>7} {'kernel s':>9} {'peer s':>8} {'ratio':>7}"
        f" {'target':>6} {'QR/layer k|p':>13} {'HH fallback':>11}  {'Γ kernel':>17}"
        f"  {'Γ peer':>17}"
    )
    for label, n, p, layers in cases:
        layers = max(8, int(layers * args.layers_scale))
        tk, tp = [], []
        for rep in range(args.repeats):
            dt, ek, qk, fb = run_kernel(n, p, layers, 1 + rep, not args.householder)
            tk.append(dt)
            dt, ep, qp = run_peer(n, p, layers, seed=101 + rep)
            tp.append(dt)
        mk, mp = statistics.median(tk), statistics.median(tp)
        gk, sk = gamma_of(ek, n)
        gp, sp = gamma_of(ep, n)
        print(
            f"{label:>6} {n:>4} {layers:>7} {mk:>9.3f} {mp:>8.3f} {mp / mk:>6.2f}×"
            f" {TARGETS[(label, n)]:>5.1f}× {qk:>6.3f}|{qp:<6.3f} {100 * fb:>10.2f}%"
            f"  {gk:7.4f} ± {sk:.4f}  {gp:7.4f} ± {sp:.4f}",
            flush=True,
        )


if __name__ == "__main__":
    main()
