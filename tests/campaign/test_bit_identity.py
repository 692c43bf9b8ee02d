"""Bit identity, stated as it holds: one build and CPU family; other builds are said so."""

from __future__ import annotations

import io
import json
import shutil

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from sweepctl.campaign.plan import ReplicaSpec
from sweepctl.campaign.recipe import Point
from sweepctl.campaign.store import code_version
from sweepctl.campaign.worker import _start_state, _write_checkpoint, compute_replica
from sweepctl.kernel import StripState
from tests.campaign.helpers import cli


def _spec(tmp_path) -> ReplicaSpec:
    return ReplicaSpec(
        point=Point(0.0, 0.0, 1e-6, 4, 0.0),
        replica=2,
        entropy=0xABC,
        layers=3000,
        warmup=32,
        strips=4,
        checkpoint=str(tmp_path / "r.ckpt"),
        checkpoint_seconds=1e9,
    )


def _half_done_checkpoint(spec: ReplicaSpec, build: dict) -> None:
    state = _start_state(spec)
    state.advance(1500)
    _write_checkpoint(__import__("pathlib").Path(spec.checkpoint), spec, state, {})
    # rewrite the header's build as another machine would have written it
    path = __import__("pathlib").Path(spec.checkpoint)
    data = path.read_bytes()
    from sweepctl.campaign.worker import _MAGIC

    n = int.from_bytes(data[len(_MAGIC) : len(_MAGIC) + 4], "little")
    off = len(_MAGIC) + 4
    header = json.loads(data[off : off + n])
    header["build"] = build
    head = json.dumps(header).encode()
    path.write_bytes(_MAGIC + len(head).to_bytes(4, "little") + head + data[off + n :])


def test_a_checkpoint_of_this_build_resumes_bit_identically(tmp_path):
    spec = _spec(tmp_path)
    fresh = compute_replica(spec, use_checkpoint=False)
    _half_done_checkpoint(spec, code_version())
    out = compute_replica(spec)
    assert out.resumed_at_layer == 1500 and not out.notes
    assert np.asarray(out.gamma_strips).tobytes() == np.asarray(fresh.gamma_strips).tobytes()


@pytest.mark.parametrize("key", ["cpu", "numba_version", "numpy_version", "git_commit"])
def test_a_checkpoint_of_another_build_is_not_resumed_silently(tmp_path, key):
    spec = _spec(tmp_path)
    fresh = compute_replica(spec, use_checkpoint=False)
    _half_done_checkpoint(spec, {**code_version(), key: "another-" + key})
    out = compute_replica(spec)
    # restarted from layer 0 (so the result is this build's alone), and it says why
    assert out.resumed_at_layer == 0
    assert len(out.notes) == 1 and key in out.notes[0] and "another build" in out.notes[0]
    assert np.asarray(out.gamma_strips).tobytes() == np.asarray(fresh.gamma_strips).tobytes()


def test_a_strip_state_of_another_numpy_is_refused_unless_allowed(tmp_path):
    state = _start_state(_spec(tmp_path)).advance(100)
    data = state.to_bytes()
    with np.load(io.BytesIO(data)) as z:
        parts = {k: z[k] for k in z.files}
    meta = json.loads(parts["meta"].tobytes().decode())
    meta["numpy_version"] = "0.0.1"
    parts["meta"] = np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez(buf, **parts)
    with pytest.raises(ValueError, match=r"numpy 0\.0\.1"):
        StripState.from_bytes(buf.getvalue())
    again = StripState.from_bytes(buf.getvalue(), allow_other_build=True)
    assert again.layers_done == 100


def _alter_a_row(store, change) -> None:
    """Apply ``change`` to one stored row of the point N = 2, x = 0."""
    for part in sorted((store / "replicas").glob("part-*.parquet")):
        t = pq.read_table(part)
        rows = t.to_pylist()
        hit = [i for i, r in enumerate(rows) if r["width"] == 2 and r["x"] == 0.0]
        if hit:
            change(rows[hit[0]])
            pq.write_table(pa.Table.from_pylist(rows, schema=t.schema), part)
            return
    raise AssertionError("no row of N = 2, x = 0 in the store")


def _last_bit(g: list[float]) -> list[float]:
    return [float(np.nextafter(g[0], np.inf)), *g[1:]]


@pytest.mark.parametrize(
    ("other_build", "size", "expected", "code"),
    [
        (True, "ulp", "differs in the last bits (other build or CPU)", 0),
        (True, "percent", "MISMATCH", 1),
        (False, "ulp", "MISMATCH", 1),
    ],
)
def test_audit_recompute_says_which_kind_of_difference(
    reference_store, tmp_path, other_build, size, expected, code
):
    store = tmp_path / "store"
    shutil.copytree(reference_store, store)

    def change(row):
        if other_build:
            row["cpu"] = "another-cpu"
        g = row["gamma_strips"]
        row["gamma_strips"] = _last_bit(g) if size == "ulp" else [v * 1.01 for v in g]

    _alter_a_row(store, change)
    proc = cli("audit", store, "--point", "N=2,x=0", "--recompute", "100")
    assert proc.returncode == code, proc.stdout
    assert expected in proc.stdout
    # every other replica of the point recomputes bit-identically
    assert proc.stdout.count("bit-identical") >= 1
