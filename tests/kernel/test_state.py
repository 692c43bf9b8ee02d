"""Independent dense check, reproducibility, chunking, resume, precision stopping."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import numpy as np
import pytest
import scipy.linalg

from sweepctl.kernel import (
    NetworkModel,
    StripState,
    advance_to_precision,
    dense_column,
    dense_layer,
    draw_layers,
    lyapunov_spectrum,
)
from sweepctl.kernel._loops import unit_phases

MODELS = {
    "clean": NetworkModel(4, 0.3),
    "disordered": NetworkModel(3, -0.2, p_block=0.3, p_open=0.2, epsilon=1e-3),
    "blocking-1e-6": NetworkModel(4, 0.0, p_block=1 / 3, p_open=1 / 3, epsilon=1e-6),
    "single-node": NetworkModel(1, 0.4),
}


def _dense_reference(model, frame0, draws, layers, per_column):
    """(1/L) Σ log|R_ii| from dense matrices and scipy.linalg.qr, per strip."""
    out = []
    for s in range(frame0.shape[0]):
        f = frame0[s]
        acc = np.zeros(f.shape[1])
        for layer in range(layers):
            if per_column:
                mats = [dense_column(model, draws, layer, s, h) for h in (0, 1)]
            else:
                mats = [dense_layer(model, draws, layer, s)]
            for m in mats:
                q, r = scipy.linalg.qr(m @ f, mode="economic")
                acc += np.log(np.abs(np.diag(r)))
                f = q
        out.append(acc / layers)
    return np.array(out)


@pytest.mark.parametrize("name", list(MODELS))
def test_matches_dense_layers_and_scipy_qr(name):
    """Same draws, built as dense 2N×2N matrices and reduced with scipy.linalg.qr."""
    model, strips, layers = MODELS[name], 2, 60
    state = StripState.start(model, strips=strips, seed=7, warmup=0)
    frame0 = state.frame.copy()
    rng = np.random.Generator(np.random.PCG64())
    rng.bit_generator.state = state.rng.bit_generator.state
    fast = state.advance(layers).result().exponents
    draws = draw_layers(model, rng, layers, strips)
    if not (model.has_node_disorder and model.epsilon < 1e-4):
        ref = _dense_reference(model, frame0, draws, layers, per_column=False)
        # [derived] both compute (1/L) Σ log|R_ii| of the same product; only rounding
        # differs (QR schedule, phase evaluation).
        assert np.allclose(fast, ref, rtol=0, atol=1e-10)
    else:
        # At ε = 1e-6 one whole layer can have condition number ~e^{58} > 1/eps, so the
        # dense reference reduces after each column. A blocking node's contracting
        # direction is then known only to ~eps/ε² in double precision (in either
        # code), which reshuffles nearly degenerate exponents of a 60-layer strip;
        # the volume growth (their sum) and the top exponent are well conditioned.
        ref = _dense_reference(model, frame0, draws, layers, per_column=True)
        assert np.allclose(fast.sum(axis=1), ref.sum(axis=1), rtol=0, atol=1e-9)
        # The top exponent agrees to 1e-10 only where both codes round the first column
        # alike (Householder in both): near a blocking node's contracting direction a
        # rounding of the first column is amplified up to 4u/ε² ≈ 9e-4 ([M2]
        # tests/REFERENCES.md), so the CholeskyQR path (other rounding) differs from it
        # by ~1e-7 on this strip. Checked on the Householder-only engine.
        hh = StripState.start(model, strips=strips, seed=7, warmup=0, cholesky=False)
        top = hh.advance(layers).result().exponents[:, 0]
        assert np.allclose(top, ref[:, 0], rtol=0, atol=1e-10)


SCHEDULE_MODELS = {
    # x = 0.3: 2θ per column is 2·arcsinh(e^{±0.3}), ≈ 3.5 per layer, so the 29.1 budget
    # holds ~8 layers (16 columns) between QRs: a fraction ≈ 1/16 of QR-every-column.
    "clean": (NetworkModel(4, 0.3), 0.1),
    # ε = 1e-2 (2θ = 10.6) on nearly every column (all but (2/3)^16 of them carry a
    # blocking node in one of 4 strips): two columns fit in the budget, a third does not,
    # so one QR per ~2 columns.
    "blocking-1e-2": (NetworkModel(4, 0.0, p_block=1 / 3, p_open=1 / 3, epsilon=1e-2), 0.6),
    # rare blocking nodes at ε = 1e-4 (2θ = 19.8) among normal ones (1.76): a blocking
    # column arriving on top of accumulated growth must trigger a QR first. About one
    # QR per blocking column (28 % of columns: 1 − 0.98^16) plus one per ~16 others.
    "rare-blocking-1e-4": (
        NetworkModel(4, 0.0, p_block=0.02, p_open=0.02, epsilon=1e-4),
        0.5,
    ),
}


@pytest.mark.parametrize("name", list(SCHEDULE_MODELS))
def test_adaptive_interval_loses_no_accuracy(name):
    """Default schedule vs a QR before every column, same draws: equal to ~1e-9.

    Each model is one where the adaptive schedule really skips QRs (asserted), so the
    comparison is between two different computations of the same product.
    """
    model, max_fraction = SCHEDULE_MODELS[name]
    a = StripState.start(model, strips=4, seed=8).advance(3000)
    b = StripState.start(model, strips=4, seed=8, log_cond_budget=1e-9).advance(3000)
    # [derived] fractions from the growth bounds in SCHEDULE_MODELS' comments.
    assert a.reorthogonalisations < max_fraction * b.reorthogonalisations
    # [derived] only the QR schedule differs; the adaptive one keeps the frame's
    # condition bound below 1e-3/u and its actual condition number far below that.
    assert np.allclose(a.result().exponents, b.result().exponents, rtol=1e-9, atol=1e-12)


def test_same_seed_same_bits_different_seed_different_numbers():
    a = lyapunov_spectrum(4, 0.1, 500, strips=3, seed=5)
    b = lyapunov_spectrum(4, 0.1, 500, strips=3, seed=5)
    c = lyapunov_spectrum(4, 0.1, 500, strips=3, seed=6)
    assert a.exponents.tobytes() == b.exponents.tobytes()
    assert not np.any(a.exponents == c.exponents)


def test_seed_sequence_and_int_seeds():
    ss = np.random.SeedSequence(123, spawn_key=(4, 2))
    a = lyapunov_spectrum(3, 0.0, 300, strips=2, seed=ss)
    b = lyapunov_spectrum(3, 0.0, 300, strips=2, seed=np.random.SeedSequence(123, spawn_key=(4, 2)))
    assert np.array_equal(a.exponents, b.exponents)
    with pytest.raises(ValueError, match="seed"):
        lyapunov_spectrum(3, 0.0, 10, seed=-1)


@pytest.mark.parametrize("name", list(MODELS))
def test_chunk_independence(name):
    model = MODELS[name]
    whole = StripState.start(model, strips=3, seed=9, warmup=25).advance(1025)
    pieces = StripState.start(model, strips=3, seed=9, warmup=25)
    for k in (1, 7, 17, 300, 0, 700):  # crosses the warm-up end mid-piece
        pieces.advance(k)
    assert pieces.layers_done == whole.layers_done == 1025
    assert whole.result().exponents.tobytes() == pieces.result().exponents.tobytes()
    assert whole.frame.tobytes() == pieces.frame.tobytes()


def test_state_round_trip_in_process():
    model = MODELS["disordered"]
    a = StripState.start(model, strips=2, seed=3).advance(400)
    b = StripState.from_bytes(a.to_bytes())
    a.advance(321)
    b.advance(321)
    assert a.result().exponents.tobytes() == b.result().exponents.tobytes()
    assert a.rng.bit_generator.state == b.rng.bit_generator.state


def test_resume_in_another_process_is_bit_identical(tmp_path):
    model = MODELS["blocking-1e-6"]
    l1, l2 = 333, 444
    uninterrupted = StripState.start(model, strips=3, seed=17).advance(l1 + l2).result()

    saved = tmp_path / "state.bin"
    saved.write_bytes(StripState.start(model, strips=3, seed=17).advance(l1).to_bytes())
    out = tmp_path / "exponents.npy"
    script = textwrap.dedent(
        f"""
        import numpy as np
        from pathlib import Path
        from sweepctl.kernel import StripState
        st = StripState.from_bytes(Path({str(saved)!r}).read_bytes())
        st.advance({l2})
        np.save({str(out)!r}, st.result().exponents)
        """
    )
    subprocess.run([sys.executable, "-c", script], check=True, timeout=300)
    resumed = np.load(out)
    assert resumed.tobytes() == uninterrupted.exponents.tobytes()


def test_corrupt_state_is_refused():
    with pytest.raises(Exception):  # noqa: B017 - any decoding error is acceptable
        StripState.from_bytes(b"not a state")


def test_advance_to_precision_reaches_target():
    st = StripState.start(NetworkModel(4, 0.0), strips=8, seed=1)
    out = advance_to_precision(st, target=0.02, max_layers=200_000, check_every=1000)
    assert out.reached and out.reason == "precision"
    assert out.rel_err <= 0.02
    assert out.result.Gamma_err / out.result.Gamma <= 0.02
    assert out.result.layers % 1000 == 0


def test_advance_to_precision_stops_at_cap():
    st = StripState.start(NetworkModel(4, 0.0), strips=4, seed=1)
    out = advance_to_precision(st, target=1e-6, max_layers=3000, check_every=1000)
    assert not out.reached and out.reason == "layer cap"
    assert out.result.layers == 3000


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        (dict(width=0), "width"),
        (dict(width=2.5), "width"),
        (dict(p_block=-0.1), "p_block"),
        (dict(p_open=1.5), "p_open"),
        (dict(p_block=0.6, p_open=0.6), "at most 1"),
        (dict(epsilon=0.0), "epsilon"),
        (dict(epsilon=0.5), "epsilon"),
        (dict(x=float("nan")), "finite"),
    ],
)
def test_bad_model_parameters(kwargs, match):
    args = dict(width=4, x=0.0) | kwargs
    with pytest.raises(ValueError, match=match):
        NetworkModel(**args)


def test_unit_phases_accurate():
    u = np.random.default_rng(0).random(200_000)
    u[:3] = [0.0, 0.5, 1.0 - 2.0**-53]
    u = u.reshape(1, 1, -1)
    c, s = np.empty_like(u), np.empty_like(u)
    unit_phases(u, c, s)
    # [derived] table + degree-9 Taylor remainder: error a few ulp of 1.
    assert np.max(np.abs(c - np.cos(2 * np.pi * u))) < 1e-15
    assert np.max(np.abs(s - np.sin(2 * np.pi * u))) < 1e-15


def test_certified_cholesky_schedule_matches_householder_after_every_column():
    """p_block = p_open = 1/3, ε = 1e-6: the default engine (CholeskyQR, adaptive
    schedule) against Householder after every column, same draws, per strip."""
    model = NetworkModel(8, 0.0, p_block=1 / 3, p_open=1 / 3, epsilon=1e-6)
    strips, layers = 8, 1500
    a = StripState.start(model, strips=strips, seed=9)
    a.advance(a.warmup)
    q0 = a.reorthogonalisations
    ga = a.advance(layers).result().Gamma_strips
    qrs = a.reorthogonalisations - q0 + 1
    b = StripState.start(model, strips=strips, seed=9, log_cond_budget=1e-9, cholesky=False)
    gb = b.advance(b.warmup + layers).result().Gamma_strips
    d = ga - gb
    # [K8] tests/REFERENCES.md: paired difference on the same draws, no bias at 4σ
    assert abs(d.mean()) < 4.0 * d.std(ddof=1) / np.sqrt(strips)
    # engine module docstring: at most ~1e-3 relative per R_ii per QR, |d_s| ≤ N·1e-3·Q/L
    assert np.abs(d).max() < model.width * 1e-3 * qrs / layers
