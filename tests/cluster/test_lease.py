"""The store's lease: heartbeat, expiry, atomic take-over on any host (real processes)."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from sweepctl.campaign.store import Store, StoreLocked, read_lease
from tests.campaign.helpers import cli, events, kill_pids, wait_until, worker_pids, write_recipe

# A contender: says it is ready, waits for the start signal, tries to take the lease, says
# which; the winner holds it until told to release (so a late contender cannot win after it).
_CONTENDER = """
import os, sys, time
from pathlib import Path
from sweepctl.campaign.store import Store, StoreLocked
root, go, ready, release = (Path(a) for a in sys.argv[1:5])
ready.touch()
while not go.exists():
    time.sleep(0.001)
st = Store(root)
try:
    st.acquire_lock(expiry=30)
except StoreLocked:
    print("LOCKED", flush=True)
    sys.exit(0)
print("WON", flush=True)
st.append_events([{"event": "won", "pid": os.getpid()}])
while not release.exists():
    time.sleep(0.01)
st.release_lock()
"""


def stale_lease(store: Path, host: str = "node-b", age: float = 3600.0, expiry: float = 60.0):
    """The lease record a driver on ``host`` left ``age`` seconds ago without a clean-up."""
    d = store / "lease"
    d.mkdir(parents=True, exist_ok=True)
    t = time.time() - age
    rec = {"token": "t-node-b", "pid": 4242, "host": host, "since": t, "expiry": expiry}
    (d / "g000000007.json").write_text(json.dumps(rec))
    (d / "g000000007.beat").write_text(json.dumps({"token": "t-node-b", "renewed": t}))


@pytest.mark.parametrize("round_", range(4))
def test_two_contenders_on_a_stale_lease_exactly_one_wins(tmp_path, round_):
    store = tmp_path / "store"
    stale_lease(store)
    go, release = tmp_path / "go", tmp_path / "release"
    ready = [tmp_path / f"ready-{i}" for i in range(2)]
    env = {**os.environ, "SWEEPCTL_FAULT": "slow-takeover"}  # both see it stale first
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", _CONTENDER, str(store), str(go), str(r), str(release)],
            stdout=subprocess.PIPE,
            text=True,
            env=env,
        )
        for r in ready
    ]
    wait_until(lambda: all(r.exists() for r in ready), 60, "both contenders ready")
    go.touch()
    # the loser exits at once; a second winner (the bug) would wait for the release too
    wait_until(lambda: any(p.poll() is not None for p in procs), 60, "a contender to lose")
    release.touch()
    outs = sorted(p.communicate(timeout=60)[0].strip() for p in procs)
    assert outs == ["LOCKED", "WON"]
    st = read_lease(store / "lease")
    assert st is not None and st.generation == 8 and st.released  # 7 + 1, then released
    assert [e["event"] for e in Store(store).read_events()] == ["won"]


def test_lease_of_a_driver_on_another_host_taken_over_once_expired(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    store = tmp_path / "store"
    # a live-looking lease of another host: refused, naming the host and the expiry
    stale_lease(store, age=5.0, expiry=600.0)
    proc = cli("run", recipe, "--store", store, "--workers", "1")
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "node-b" in proc.stderr and "expires in" in proc.stderr
    assert "Traceback" not in proc.stderr
    # the same lease, its heartbeat older than its expiry: any host may take over
    stale_lease(store, age=120.0, expiry=60.0)
    proc = cli("run", recipe, "--store", store, "--workers", "1")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    start = next(e for e in events(store) if e.get("event") == "run-start")
    assert start["took_over"] == {"pid": 4242, "host": "node-b", "generation": 7}
    kill_pids(worker_pids(store))


def test_lease_wait_takes_over_when_the_lease_expires(tmp_path):
    recipe = write_recipe(tmp_path / "r.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    store = tmp_path / "store"
    stale_lease(store, age=0.0, expiry=8.0)  # expires 8 s from now unless renewed
    proc = cli("run", recipe, "--store", store, "--workers", "1", "--lease-wait", "2m")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    start = next(e for e in events(store) if e.get("event") == "run-start")
    assert start["took_over"]["host"] == "node-b"
    # it did wait for the expiry: the new lease starts after the old one's end
    new = read_lease(store / "lease")
    rec = json.loads((store / "lease" / "g000000007.json").read_text())
    assert new.since >= rec["since"] + 8.0


def test_heartbeat_keeps_a_short_lease_and_a_frozen_holder_stops_writing(tmp_path):
    store = Store(tmp_path / "store")
    store.root.mkdir()
    # a 3-second lease, renewed every 0.3 s: a loaded machine may delay some heartbeats, but
    # not by a whole expiry
    lease = store.acquire_lock(expiry=3.0)
    first = read_lease(store.lease_dir)
    time.sleep(7.5)  # 2.5 expiries: only the heartbeat keeps it
    st = read_lease(store.lease_dir)
    assert st.generation == first.generation and st.renewed > first.renewed + 4.5
    assert not st.free()
    with pytest.raises(StoreLocked):
        Store(store.root).acquire_lock(expiry=1.0)  # another driver (same host, live pid)
    # freeze the holder (no more heartbeats, as in a suspended job), let it expire, and
    # let a driver in another process take over
    lease._stop.set()
    lease._thread.join()
    time.sleep(3.6)  # 1.2 expiries
    out = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from sweepctl.campaign.store import Store; "
            "s = Store(sys.argv[1]); s.acquire_lock(expiry=30); print(s.lease.generation)",
            str(store.root),
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.stdout.strip() == str(first.generation + 1), out.stderr
    with pytest.raises(StoreLocked, match="no longer holds"):
        store.append_events([{"event": "late"}])
    assert not any(e.get("event") == "late" for e in store.read_events())
    store.release_lock()
    assert not (store.lease_dir / f"g{first.generation:09d}.end").exists()  # not ours to end


def test_clean_release_frees_at_once_and_refused_run_leaves_no_record(tmp_path):
    store = Store(tmp_path / "store")
    store.root.mkdir()
    store.acquire_lock(expiry=600)
    store.append_events([{"event": "x"}])
    store.release_lock()
    st = read_lease(store.lease_dir)
    assert st.released and st.host == socket.gethostname()
    s2 = Store(store.root)
    s2.acquire_lock(expiry=600)  # no wait for the 10-minute expiry
    s2.release_lock()  # wrote nothing: its record goes, the previous one is newest again
    assert read_lease(store.lease_dir).generation == st.generation


def test_driver_sigkilled_then_rerun_on_the_same_host_needs_no_wait(tmp_path):
    from tests.campaign.helpers import start_cli
    from tests.campaign.test_faults import FAULT

    recipe = write_recipe(tmp_path / "r.toml", {**FAULT, "axes": {"widths": [2]}})
    store = tmp_path / "store"
    drv = start_cli("run", recipe, "--store", store, "--workers", "1")
    try:
        wait_until(lambda: read_lease(store / "lease"), 120, "the lease")
        wait_until(lambda: worker_pids(store), 120, "the workers")
        drv.kill()
        drv.wait(timeout=30)
    finally:
        kill_pids(worker_pids(store))
    st = read_lease(store / "lease")
    assert not st.released and st.expires_in() > 60  # the default expiry is far off
    # no --lease-wait: a refusal would exit 2; its pid is dead here, so it is taken over
    proc = cli("run", recipe, "--store", store, "--workers", "1", "--lease-expiry", "1h")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    start = [e for e in events(store) if e.get("event") == "run-start"][-1]
    assert start["took_over"]["host"] == socket.gethostname() and start["lease_expiry"] == 3600
    kill_pids(worker_pids(store))
