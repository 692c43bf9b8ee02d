"""The cost model's replay of the QR schedule against the engine's QRs, column by column.

``schedule._count`` is what :func:`~sweepctl.kernel.schedule.expected_qr_per_layer`
runs on columns drawn from the node law; here it runs on the engine's *own* columns
(the same draws, taken from a copy of the bit generator), so the two QR counts must be
equal exactly, not only on average. The statistical check of the expected value lives in
tests/campaign/test_cost.py.
"""

from __future__ import annotations

import numpy as np
import pytest

from sweepctl.kernel import NetworkModel, StripState, draw_layers
from sweepctl.kernel._loops import column_bounds
from sweepctl.kernel.schedule import _count, budget_units, growth_units

MODELS = [
    NetworkModel(8, 0.0),
    NetworkModel(6, 0.45),
    NetworkModel(8, 0.0, 1 / 3, 1 / 3, 1e-6),
    NetworkModel(8, 0.0, 0.02, 0.02, 1e-4),
    NetworkModel(4, 0.3, 0.05, 0.02, 1e-2),
]


@pytest.mark.parametrize("model", MODELS, ids=lambda m: f"N{m.width}-p{m.p_block:.2f}-e{m.epsilon}")
def test_schedule_replay_counts_the_engines_qrs_exactly(model):
    strips, layers = 4, 1500
    state = StripState.start(model, strips=strips, seed=5, warmup=0)
    rng = np.random.Generator(np.random.PCG64())
    rng.bit_generator.state = state.rng.bit_generator.state
    for piece in (1, 700, 799):  # the engine's own chunking must not matter
        state.advance(piece)
    draws = draw_layers(model, rng, layers, strips)
    bounds = np.empty(2 * layers, dtype=np.int64)
    counts = np.zeros((strips, 2, 3), np.int64)
    column_bounds(draws.kinds, growth_units(model), bounds, counts, False)
    qrs, _ = _count(bounds.tolist(), budget_units())
    # derived: the engine's rule (engine.StripState._apply_scheduled) replayed on its own
    # column bounds (the QR of the start frame is not a scheduled one and is not counted).
    assert qrs == state.reorthogonalisations
    assert qrs > 0
