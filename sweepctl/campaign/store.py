"""The campaign store: a directory with pinned Parquet schemas, written atomically.

Layout::

    STORE/
      campaign.json          frozen settings, recipe history, provenance (atomic rewrite)
      replicas/part-*.parquet replica rows (pinned schema), one file per driver batch
      events.jsonl           append-only log: run, submitted, started, resumed, finished, …
      checkpoints/           in-flight strip states, one file per replica (workers write
                             them atomically; the driver removes them once the row is in)
      lease/                 the driver's lease: numbered records (pid, host, expiry) and
                             heartbeats; see :class:`Lease`
      merged/                output of ``sweepctl merge``

Single writer: only the driver writes tables, events and campaign.json. Every file is
written under a hidden temporary name and ``os.replace``d into place, so a kill never
leaves a torn file that readers see; leftover temporaries are removed by the next
driver.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import socket
import subprocess
import threading
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import lru_cache
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from sweepctl import __version__
from sweepctl.errors import SweepctlError

__all__ = [
    "REPLICA_SCHEMA",
    "RESULT_COLUMNS",
    "Duplicate",
    "ReplicaRows",
    "Store",
    "StoreError",
    "StoreIntegrityError",
    "StoreLocked",
    "atomic_write_bytes",
    "code_version",
    "cpu_identity",
]

SCHEMA_VERSION = "replicas/3"
CONVENTIONS = (
    "Chalker-Coddington strip, N nodes per column, 2N links, periodic; exponents per layer; "
    "Gamma = N * gamma (smallest positive exponent); gamma_strips holds Gamma per strip; "
    "A column on pairs (2j,2j+1), B on (2j+1,2j+2 mod 2N); sinh(theta_A)=e^x; "
    "A nodes blocking with p_block, open with p_open, roles swapped on B"
)

REPLICA_SCHEMA = pa.schema(
    [
        ("point_key", pa.string()),
        ("p_block", pa.float64()),
        ("p_open", pa.float64()),
        ("epsilon", pa.float64()),
        ("width", pa.int32()),
        ("x", pa.float64()),
        ("replica", pa.int32()),
        ("entropy", pa.string()),
        ("spawn_key", pa.list_(pa.int64())),
        ("bit_generator", pa.string()),
        ("layers", pa.int64()),
        ("warmup", pa.int32()),
        ("strips", pa.int32()),
        ("gamma_strips", pa.list_(pa.float64())),
        ("exponents", pa.list_(pa.float64())),
        ("Gamma", pa.float64()),
        ("resumed_at_layer", pa.int64()),
        ("cpu_seconds", pa.float64()),
        ("wall_seconds", pa.float64()),
        ("worker", pa.string()),
        ("host", pa.string()),
        ("batch_job_id", pa.string()),
        ("started", pa.timestamp("us", tz="UTC")),
        ("finished", pa.timestamp("us", tz="UTC")),
        ("sweepctl_version", pa.string()),
        ("git_commit", pa.string()),
        ("numpy_version", pa.string()),
        # replicas/2: the rest of the build a result's bits depend on
        ("numba_version", pa.string()),
        ("cpu", pa.string()),
        # replicas/3: what computed the row (JSON: {"kind": "network"} or the rehearsal
        # law), and the CPU and wall seconds really spent; a rehearsal row's cpu_seconds
        # and wall_seconds are what the network kernel would have spent
        ("model", pa.string()),
        ("real_cpu_seconds", pa.float64()),
        ("real_wall_seconds", pa.float64()),
    ],
    metadata={"sweepctl.schema": SCHEMA_VERSION, "sweepctl.conventions": CONVENTIONS},
)
#: Columns added after ``replicas/1``, in the order they were added (each a suffix of
#: the schema): part files written before them read as null.
ADDED_COLUMNS = ("numba_version", "cpu", "model", "real_cpu_seconds", "real_wall_seconds")
#: What a result's bits depend on besides its seed (compared by resume and audit).
BUILD_COLUMNS = ("sweepctl_version", "git_commit", "numpy_version", "numba_version", "cpu")


class StoreError(SweepctlError, RuntimeError):
    """A store that cannot be used as asked (message says why and what to do)."""


class StoreLocked(StoreError):
    """Another live driver owns the store."""


class StoreIntegrityError(StoreError):
    """The store holds contradictory rows (the same replica with different numbers)."""


#: The columns that make up a replica's result: two rows of one (point, replica) that
#: agree on all of them are one result stored twice; provenance (times, worker, host)
#: may differ between two honest computations of the same replica.
RESULT_COLUMNS = (
    "point_key",
    "p_block",
    "p_open",
    "epsilon",
    "width",
    "x",
    "replica",
    "entropy",
    "spawn_key",
    "bit_generator",
    "layers",
    "warmup",
    "strips",
    "gamma_strips",
    "exponents",
    "Gamma",
)


@dataclass(frozen=True)
class Duplicate:
    """A (point, replica) found in two rows."""

    point_key: str
    replica: int
    first_file: str
    other_file: str


@dataclass
class ReplicaRows:
    """Replica rows, one per (point, replica), and the duplicates the reader met."""

    table: pa.Table
    identical: list[Duplicate]
    conflicts: list[Duplicate]


@lru_cache(maxsize=1)
def cpu_identity() -> str:
    """The CPU family a result's last bits depend on.

    numba compiles the layer loop for the host CPU (instruction set, FMA contraction)
    and OpenBLAS picks CPU-specific LAPACK/BLAS kernels (the QR), so results are
    bit-identical only within one such family: ``"<llvm host cpu>/<blas>:<kernel>…"``.
    """
    parts = []
    with contextlib.suppress(Exception):
        import llvmlite.binding as llb

        parts.append(llb.get_host_cpu_name())
    with contextlib.suppress(Exception):
        import scipy.linalg  # noqa: F401  (loads the LAPACK the kernel's QR calls)
        from threadpoolctl import threadpool_info

        parts += sorted(
            {
                f"{i.get('internal_api')}:{i.get('architecture')}"
                for i in threadpool_info()
                if i.get("architecture")
            }
        )
    return "/".join(parts) or "unknown"


@lru_cache(maxsize=1)
def code_version() -> dict[str, str]:
    """The build behind a result: sweepctl version and git commit (``-dirty`` if
    modified), NumPy and numba versions, and the CPU family (:func:`cpu_identity`)."""
    here = Path(__file__).resolve().parent
    commit = "unknown"
    try:
        out = subprocess.run(
            ["git", "-C", str(here), "rev-parse", "HEAD"],
            capture_output=True,
            text=True,
            timeout=5,
            check=True,
        )
        commit = out.stdout.strip()
        dirty = subprocess.run(
            ["git", "-C", str(here), "status", "--porcelain", "--untracked-files=no", "--", "."],
            capture_output=True,
            text=True,
            timeout=5,
        )
        if dirty.stdout.strip():
            commit += "-dirty"
    except (OSError, subprocess.SubprocessError):
        pass
    import numba
    import numpy

    return {
        "sweepctl_version": __version__,
        "git_commit": commit,
        "numpy_version": numpy.__version__,
        "numba_version": numba.__version__,
        "cpu": cpu_identity(),
    }


#: Part files smaller than this are compacted (bytes) ...
COMPACT_SMALL_BYTES = 16 << 20
#: ... into files of about this size.
COMPACT_TARGET_BYTES = 128 << 20
#: The driver compacts once this many small part files have accumulated
#: (``sweepctl run --compact-at``): at one flush per 5 s, about every 5 minutes.
COMPACT_AT = 64


def _size(p: Path) -> int:
    try:
        return p.stat().st_size
    except OSError:
        return 0


def _fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a hidden temporary and ``os.replace``."""
    tmp = path.parent / f".{path.name}.tmp-{uuid.uuid4().hex[:8]}"
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    _fsync_dir(path.parent)


def _read_json(path: Path) -> dict:
    with contextlib.suppress(OSError, ValueError):
        d = json.loads(path.read_text())
        return d if isinstance(d, dict) else {}
    return {}


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


# -------------------------------------------------------------------------- the lease

#: How long a lease stays valid without a heartbeat (seconds) unless the driver says
#: otherwise (``sweepctl run --lease-expiry``); the holder renews it every tenth of that.
LEASE_EXPIRY_SECONDS = 600.0
_GEN = re.compile(r"^g(\d{9})\.json$")


def lease_expiry_default() -> float:
    return LEASE_EXPIRY_SECONDS


@dataclass(frozen=True)
class LeaseState:
    """The newest lease record in ``STORE/lease/`` and its last heartbeat.

    ``renewed`` is the holder's wall clock (seconds since the epoch) at its last
    heartbeat; ``expiry`` is how long the holder promised to renew within.
    """

    generation: int
    token: str
    pid: int | None
    host: str | None
    since: float
    renewed: float
    expiry: float
    released: bool

    def expires_in(self, now: float | None = None) -> float:
        """Seconds until another driver may take over (negative: expired)."""
        return self.renewed + self.expiry - (time.time() if now is None else now)

    def dead_here(self) -> bool:
        """Held by a process of this host that no longer exists."""
        return (
            self.host == socket.gethostname()
            and isinstance(self.pid, int)
            and self.pid != os.getpid()
            and not _pid_alive(self.pid)
        )

    def free(self, now: float | None = None) -> bool:
        """Whether a new driver may take over: released, expired, or its process is
        known dead (same host)."""
        return self.released or self.expires_in(now) < 0 or self.dead_here()

    def to_json(self) -> dict:
        return {
            "generation": self.generation,
            "pid": self.pid,
            "host": self.host,
            "since": _iso(self.since),
            "last_heartbeat": _iso(self.renewed),
            "expiry_seconds": self.expiry,
            "released": self.released,
            "expires_in_seconds": round(self.expires_in(), 1),
        }


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds")


def _generations(lease_dir: Path) -> list[int]:
    try:
        names = os.listdir(lease_dir)
    except OSError:
        return []
    return sorted(int(m.group(1)) for n in names if (m := _GEN.match(n)))


def _gen_file(lease_dir: Path, g: int, suffix: str = "json") -> Path:
    return lease_dir / f"g{g:09d}.{suffix}"


def read_lease(lease_dir: Path) -> LeaseState | None:
    """The newest lease record (``None`` if no driver ever held one)."""
    for _ in range(5):  # a record removed while reading: read the listing again
        gens = _generations(lease_dir)
        if not gens:
            return None
        g = gens[-1]
        rec = _read_json(_gen_file(lease_dir, g))
        if not rec:
            continue
        beat = _read_json(_gen_file(lease_dir, g, "beat"))
        renewed = float(rec.get("since", 0.0))
        if beat.get("token") == rec.get("token"):
            renewed = max(renewed, float(beat.get("renewed", renewed)))
        return LeaseState(
            generation=g,
            token=str(rec.get("token")),
            pid=rec.get("pid") if isinstance(rec.get("pid"), int) else None,
            host=rec.get("host"),
            since=float(rec.get("since", 0.0)),
            renewed=renewed,
            expiry=float(rec.get("expiry", LEASE_EXPIRY_SECONDS)),
            released=_gen_file(lease_dir, g, "end").exists(),
        )
    return None


def _link_json(path: Path, record: dict) -> bool:
    """Create ``path`` holding ``record``, complete or not at all; ``False`` if it exists.

    The record is written to a temporary and hard-linked into place: ``link`` fails if
    the name exists, atomically also on NFS, so of two drivers racing for one name
    exactly one succeeds, and nobody ever sees a half-written record.
    """
    tmp = path.parent / f".{path.name}.tmp-{uuid.uuid4().hex[:8]}"
    with open(tmp, "w") as fh:
        fh.write(json.dumps(record))
        fh.flush()
        os.fsync(fh.fileno())
    try:
        os.link(tmp, path)
    except FileExistsError:
        return False
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()
    _fsync_dir(path.parent)
    return True


class Lease:
    """The right to write a store, held by one driver and renewed by a heartbeat.

    ``STORE/lease/`` holds numbered records ``g000000001.json``, … The newest one names
    the holder (pid, host, a random token, the expiry it promises to renew within); the
    holder's heartbeat thread rewrites ``gN.beat`` every tenth of the expiry, and on a
    clean exit it writes ``gN.end``. A driver may take over when the newest lease is
    released, has had no heartbeat for its expiry (on any host), or names a dead process
    of the taker's own host. Taking over is creating record ``N+1`` with ``link``, which
    exactly one contender wins. The holder stops writing as soon as record ``N+1``
    exists or its own last renewal is older than the expiry, so a driver that was
    merely frozen (a suspended job, a hung file server) never writes after a take-over.
    Host clocks must agree to well within the expiry (NTP does).
    """

    def __init__(self, store: Store, expiry: float) -> None:
        if not expiry > 0:
            raise StoreError(f"lease expiry = {expiry!r}: must be a positive number of seconds")
        self.store = store
        self.dir = store.lease_dir
        self.expiry = float(expiry)
        self.interval = max(0.05, min(self.expiry / 10.0, 60.0))
        self.token = uuid.uuid4().hex
        self.generation: int | None = None
        self.previous: LeaseState | None = None
        self.lost: str | None = None
        self._last_ok = 0.0
        self._beats = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # -- taking and giving back ---------------------------------------------------------
    def acquire(self, wait: float = 0.0) -> None:
        """Take the lease, waiting up to ``wait`` seconds for the holder to end."""
        self.dir.mkdir(parents=True, exist_ok=True)
        _refuse_legacy_lock(self.store)
        deadline = time.monotonic() + max(0.0, wait)
        while True:
            st = read_lease(self.dir)
            if st is None or st.free():
                g = 1 if st is None else st.generation + 1
                if os.environ.get("SWEEPCTL_FAULT") == "slow-takeover":
                    time.sleep(0.5)  # fault-injection hook: widen the race window in tests
                now = time.time()
                record = {
                    "token": self.token,
                    "pid": os.getpid(),
                    "host": socket.gethostname(),
                    "since": now,
                    "expiry": self.expiry,
                    "took_over": None if st is None else st.generation,
                }
                if _link_json(_gen_file(self.dir, g), record):
                    self.generation, self.previous = g, st
                    self._last_ok = time.monotonic()
                    self._beat()
                    self._thread = threading.Thread(
                        target=self._heartbeat, daemon=True, name="sweepctl-lease"
                    )
                    self._thread.start()
                    return
                continue  # another driver created it first: read again
            if time.monotonic() >= deadline:
                raise StoreLocked(self.store.locked_message(st))
            time.sleep(min(1.0, self.interval, max(0.01, deadline - time.monotonic())))

    def release(self, wrote: bool = True) -> None:
        """Stop the heartbeat and mark the lease released (if it is still ours); a driver
        that wrote nothing removes its record instead, leaving the store as it found it."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)
        g = self.generation
        if g is not None and self.lost is None and self._still_newest():
            with contextlib.suppress(OSError):
                if wrote:
                    _link_json(_gen_file(self.dir, g, "end"), {"token": self.token})
                    self._prune_old()
                else:  # the previous record (released, expired or dead) is newest again
                    _gen_file(self.dir, g, "beat").unlink(missing_ok=True)
                    _gen_file(self.dir, g).unlink()
        self.generation = None

    # -- holding ------------------------------------------------------------------------
    def check(self) -> None:
        """Raise :class:`StoreLocked` unless the lease is still ours and fresh."""
        if self.generation is None:
            return
        if self.lost is None and time.monotonic() - self._last_ok > 0.8 * self.expiry:
            self.lost = (
                f"the lease was not renewed for {time.monotonic() - self._last_ok:.0f} s "
                f"(expiry {self.expiry:g} s; is the file system responding?)"
            )
        if self.lost is None and not self._still_newest():
            self.lost = "another driver took over the lease"
        if self.lost is not None:
            raise StoreLocked(
                f"{self.store.root}: this driver no longer holds the store's lease: "
                f"{self.lost}; it stops without writing more"
            )

    def _still_newest(self) -> bool:
        g = self.generation
        return g is not None and not _gen_file(self.dir, g + 1).exists()

    def _beat(self) -> None:
        self._beats += 1
        data = {"token": self.token, "renewed": time.time(), "count": self._beats}
        atomic_write_bytes(_gen_file(self.dir, self.generation, "beat"), json.dumps(data).encode())
        self._last_ok = time.monotonic()

    def _heartbeat(self) -> None:
        while not self._stop.wait(self.interval):
            if not self._still_newest():
                self.lost = "another driver took over the lease"
                return
            with contextlib.suppress(OSError):  # a missed beat; check() notices a run of them
                self._beat()

    def _prune_old(self) -> None:
        """Remove records older than the previous generation (kept for the record)."""
        for g in _generations(self.dir):
            if g < self.generation - 1:
                for suf in ("json", "beat", "end"):
                    with contextlib.suppress(OSError):
                        _gen_file(self.dir, g, suf).unlink()


def _refuse_legacy_lock(store: Store) -> None:
    """An older sweepctl driver locks ``STORE/lock`` (flock and a pid + host record):
    respect one that is running, forget one that is not."""
    import fcntl

    path = store.root / "lock"
    if not path.exists():
        return
    rec = _read_json(path)
    try:
        fd = os.open(path, os.O_RDWR)
    except OSError:
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            held = False
        except BlockingIOError:
            held = True
        except OSError:
            held = False
        pid = rec.get("pid")
        live_here = (
            rec.get("host") == socket.gethostname()
            and isinstance(pid, int)
            and pid != os.getpid()
            and _pid_alive(pid)
        )
        if held or live_here:
            raise StoreLocked(
                f"{store.root} is in use by the driver with pid {pid} on host "
                f"{rec.get('host')} (an older sweepctl, holding {path}); wait for it to finish"
            )
        with contextlib.suppress(OSError):
            path.unlink()
    finally:
        os.close(fd)


class Store:
    """A campaign store directory."""

    def __init__(self, root: str | Path) -> None:
        self.root = Path(root)
        self.campaign_file = self.root / "campaign.json"
        self.replicas_dir = self.root / "replicas"
        self.checkpoints_dir = self.root / "checkpoints"
        self.events_file = self.root / "events.jsonl"
        self.lease_dir = self.root / "lease"
        self.merged_dir = self.root / "merged"
        self._locked = False
        self._lease: Lease | None = None
        self._wrote = False

    # -- existence ------------------------------------------------------------------
    def exists(self) -> bool:
        return self.campaign_file.is_file()

    def foreign_entries(self) -> list[Path]:
        """Entries of the directory that sweepctl did not put there (before creation:
        the lock, TLS certificates, scheduler files and batch logs are its own)."""
        if not self.root.exists():
            return []
        own = {"lock", "lease", "tls", "batch-logs", "allocations"}
        return [
            p
            for p in self.root.iterdir()
            if p.name not in own and not (p.name.startswith("scheduler") and p.suffix == ".json")
        ]

    def require(self) -> None:
        """Raise a clear error unless this is a store."""
        if not self.root.exists():
            raise StoreError(f"{self.root}: no such directory; give a campaign's store directory")
        if not self.exists():
            raise StoreError(f"{self.root}: not a sweepctl store (no campaign.json)")

    def create(self, campaign: dict) -> None:
        """Create the directory layout and the first campaign.json."""
        if self.foreign_entries() and not self.exists():
            raise StoreError(
                f"{self.root}: directory exists and is not a sweepctl store; "
                "choose an empty or new directory"
            )
        self.root.mkdir(parents=True, exist_ok=True)
        for d in (self.replicas_dir, self.checkpoints_dir):
            d.mkdir(exist_ok=True)
        self.write_campaign(campaign)

    # -- campaign.json --------------------------------------------------------------
    def read_campaign(self) -> dict:
        try:
            return json.loads(self.campaign_file.read_text())
        except (OSError, json.JSONDecodeError) as exc:
            raise StoreError(f"{self.campaign_file}: unreadable ({exc})") from None

    def write_campaign(self, campaign: dict) -> None:
        self._guard()
        atomic_write_bytes(self.campaign_file, (json.dumps(campaign, indent=2) + "\n").encode())

    # -- lease ----------------------------------------------------------------------
    @contextlib.contextmanager
    def locked(self, expiry: float | None = None, wait: float = 0.0) -> Iterator[Lease]:
        """Hold the store's lease for the duration (see :class:`Lease`)."""
        lease = self.acquire_lock(expiry=expiry, wait=wait)
        try:
            yield lease
        finally:
            self.release_lock()

    def acquire_lock(self, expiry: float | None = None, wait: float = 0.0) -> Lease:
        """Take the store's lease and start its heartbeat; :class:`StoreLocked` if another
        driver holds it (after waiting up to ``wait`` seconds for it to end or expire)."""
        lease = Lease(self, expiry if expiry is not None else lease_expiry_default())
        lease.acquire(wait=wait)
        self._lease = lease
        self._locked = True
        return lease

    def release_lock(self) -> None:
        if self._lease is not None:
            self._lease.release(wrote=self._wrote)
        self._wrote = False
        self._lease = None
        self._locked = False

    @property
    def lease(self) -> Lease | None:
        """The lease this process holds on the store, if any."""
        return self._lease

    def lease_state(self) -> LeaseState | None:
        """Who holds (or last held) the lease, read without taking it."""
        return read_lease(self.lease_dir)

    def locked_message(self, st: LeaseState) -> str:
        left = st.expires_in()
        return (
            f"{self.root} is in use by the driver with pid {st.pid} on host {st.host} "
            f"(since {_iso(st.since)}, last heartbeat {_iso(st.renewed)}); wait for it to "
            f"finish, or if it died without a clean-up, run again after its lease expires "
            f"in {max(0.0, left):.0f} s (any host may then take over; "
            f"`sweepctl run --lease-wait` waits for it)"
        )

    def _guard(self) -> None:
        """Refuse to write once this process has lost the store's lease."""
        if self._lease is not None:
            self._lease.check()
        self._wrote = True

    # -- repairs after a kill (lease held) -----------------------------------------------
    def cleanup(self) -> list[Path]:
        """Remove temporaries left by a killed writer, finish an interrupted compaction,
        mend a torn last event line."""
        removed = []
        for d in (self.root, self.replicas_dir, self.checkpoints_dir, self.merged_dir):
            if d.is_dir():
                found = d.glob(".*.tmp-*") if d == self.root else d.rglob(".*.tmp-*")
                for p in found:
                    with contextlib.suppress(OSError):
                        p.unlink()
                        removed.append(p)
        removed += self._finish_compactions()
        if self.events_file.exists():
            with open(self.events_file, "r+b") as fh:
                size = fh.seek(0, os.SEEK_END)
                if size:
                    fh.seek(max(0, size - (1 << 20)))
                    tail = fh.read()
                    if not tail.endswith(b"\n"):
                        cut = tail.rfind(b"\n")
                        fh.truncate(size - len(tail) + cut + 1 if cut >= 0 else 0)
        return removed

    # -- compaction -------------------------------------------------------------------
    def small_part_files(self) -> list[Path]:
        return [p for p in self.part_files() if _size(p) < COMPACT_SMALL_BYTES]

    def compact(self, target_bytes: int = COMPACT_TARGET_BYTES) -> tuple[int, int]:
        """Rewrite the small part files as few large ones; returns (files read, written).

        Each output holds its inputs' rows unchanged (same pinned schema, values copied
        bit for bit, duplicates kept for the one reader to collapse) and names them in
        its metadata. Steps: write a temporary, ``os.replace`` it into place, delete the
        inputs. A kill before the replace leaves a temporary (removed later); a kill
        after it leaves inputs whose rows are also in the output, which the reader
        counts once and the next :meth:`cleanup` deletes.
        """
        self._finish_compactions()
        groups: list[list[Path]] = [[]]
        size = 0
        for p in self.small_part_files():
            if groups[-1] and size + _size(p) > target_bytes:
                groups.append([])
                size = 0
            groups[-1].append(p)
            size += _size(p)
        read = written = 0
        for group in groups:
            if len(group) < 2:
                continue
            self._compact_group(group)
            read += len(group)
            written += 1
        return read, written

    def _compact_group(self, group: list[Path]) -> Path:
        fault = os.environ.get("SWEEPCTL_FAULT", "")
        tables, meta = [], dict(REPLICA_SCHEMA.metadata or {})
        for p in group:
            tables.append(_read_part(p, None, REPLICA_SCHEMA).replace_schema_metadata(None))
            camp = (pq.read_schema(p).metadata or {}).get(b"sweepctl.campaign")
            if camp and b"sweepctl.campaign" not in meta:
                meta[b"sweepctl.campaign"] = camp
        meta[b"sweepctl.compacted_from"] = json.dumps([p.name for p in group]).encode()
        table = pa.concat_tables(tables).replace_schema_metadata(meta)
        # sorts where its first input did, so the reader's file order barely changes
        stem = group[0].stem.split("~", 1)[0]
        final = self.replicas_dir / f"{stem}~c{uuid.uuid4().hex[:10]}.parquet"
        self._write_part(table, final, kill_before_rename=fault == "kill-compact-written")
        if fault == "kill-compact-replaced":
            os.kill(os.getpid(), signal.SIGKILL)
        for i, p in enumerate(group):
            p.unlink(missing_ok=True)
            if fault == "kill-compact-deleting" and i == 0:
                os.kill(os.getpid(), signal.SIGKILL)
        _fsync_dir(self.replicas_dir)
        return final

    def _finish_compactions(self) -> list[Path]:
        """Delete inputs of completed compactions that a kill left behind."""
        removed = []
        names = {p.name for p in self.part_files()}
        for p in self.part_files():
            if "~c" not in p.name:
                continue
            try:
                meta = pq.read_schema(p).metadata or {}
                inputs = json.loads(meta.get(b"sweepctl.compacted_from", b"[]"))
            except (OSError, ValueError, pa.ArrowException):
                continue
            for name in inputs:
                if name in names and name != p.name:
                    self._guard()
                    with contextlib.suppress(OSError):
                        (self.replicas_dir / name).unlink()
                        removed.append(self.replicas_dir / name)
        return removed

    def remove_stored_checkpoints(self, stored: set[tuple[str, int]]) -> int:
        """Delete checkpoints of replicas whose rows are stored (``(point short name,
        replica)``): left behind when a driver died between the two steps."""
        n = 0
        if not self.checkpoints_dir.is_dir():
            return 0
        for p in self.checkpoints_dir.glob("*/r*.ckpt"):
            with contextlib.suppress(ValueError):
                if (p.parent.name, int(p.stem[1:])) in stored:
                    self._guard()
                    with contextlib.suppress(OSError):
                        p.unlink()
                        n += 1
        return n

    # -- replica rows ---------------------------------------------------------------
    def part_files(self) -> list[Path]:
        if not self.replicas_dir.is_dir():
            return []
        return sorted(p for p in self.replicas_dir.glob("part-*.parquet"))

    def write_replicas(self, rows: list[dict], campaign_meta: dict | None = None) -> Path:
        """Write one batch of replica rows as a new part file (atomic)."""
        table = pa.Table.from_pylist(rows, schema=REPLICA_SCHEMA)
        meta = dict(REPLICA_SCHEMA.metadata or {})
        if campaign_meta:
            meta[b"sweepctl.campaign"] = json.dumps(campaign_meta).encode()
        table = table.replace_schema_metadata(meta)
        name = f"part-{time.strftime('%Y%m%dT%H%M%S')}-{uuid.uuid4().hex[:10]}.parquet"
        final = self.replicas_dir / name
        kill = os.environ.get("SWEEPCTL_FAULT") == "kill-while-writing"
        self._write_part(table, final, kill_before_rename=kill)
        return final

    def _write_part(self, table: pa.Table, final: Path, kill_before_rename: bool) -> None:
        """Write ``table`` to a temporary, fsync it, and rename it to ``final`` only while
        this driver still holds the lease; readers never see a partial part file."""
        tmp = self.replicas_dir / f".{final.name}.tmp-{uuid.uuid4().hex[:8]}"
        pq.write_table(table, tmp, compression="zstd")
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        if kill_before_rename:
            os.kill(os.getpid(), signal.SIGKILL)  # fault-injection hook for tests
        try:
            self._guard()
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        os.replace(tmp, final)
        _fsync_dir(self.replicas_dir)

    def read_replicas(self, columns: list[str] | None = None) -> pa.Table:
        """All replica rows (pinned schema), one per (point, replica), in file order.

        The one reader of replica rows: replay, merge, status, fit, report and audit all
        use it. A row stored twice with the same numbers (a flush repeated after a kill,
        a part file copied by hand) is counted once; the same replica stored with
        different numbers raises :class:`StoreIntegrityError`.
        """
        return self.replica_rows(columns).table

    def replica_rows(self, columns: list[str] | None = None) -> ReplicaRows:
        """Like :meth:`read_replicas`, with the duplicates it collapsed (for ``audit``)."""
        rows = self.collect_replica_rows(columns)
        if rows.conflicts:
            c = rows.conflicts[0]
            more = f" (and {len(rows.conflicts) - 1} more)" if len(rows.conflicts) > 1 else ""
            raise StoreIntegrityError(
                f"{self.root}: replica {c.replica} of point {c.point_key} is stored twice "
                f"with different numbers ({c.first_file}, {c.other_file}){more}; the store "
                "is damaged — see `sweepctl audit`, and restore the part files from a "
                "backup or remove the wrong one"
            )
        return rows

    def collect_replica_rows(self, columns: list[str] | None) -> ReplicaRows:
        """Rows one per (point, replica) and every duplicate, conflicting ones included
        (``audit`` reports them; everything else reads through :meth:`read_replicas`)."""
        parts = self.part_files()
        want_cols = list(REPLICA_SCHEMA.names) if columns is None else list(columns)
        if not parts:
            return ReplicaRows(REPLICA_SCHEMA.empty_table().select(want_cols), [], [])
        read_cols = list(dict.fromkeys([*want_cols, "point_key", "replica"]))
        want = pa.schema([REPLICA_SCHEMA.field(c) for c in read_cols])
        # ParquetFile rather than read_table: the latter loads pyarrow.dataset and pandas
        # (~0.8 s), paid by every driver start.
        tables = [_read_part(p, read_cols, want) for p in parts]
        sizes = [t.num_rows for t in tables]
        table = pa.concat_tables(tables).replace_schema_metadata(None)
        keys = table.column("point_key").to_pylist()
        reps = table.column("replica").to_pylist()
        first: dict[tuple[str, int], int] = {}
        dups: list[tuple[int, int]] = []
        for i, k in enumerate(zip(keys, reps, strict=True)):
            j = first.setdefault(k, i)
            if j != i:
                dups.append((j, i))
        identical: list[Duplicate] = []
        conflicts: list[Duplicate] = []
        if dups:
            file_of = [p.name for p, n in zip(parts, sizes, strict=True) for _ in range(n)]
            numbers = pa.concat_tables(
                [_read_part(p, list(RESULT_COLUMNS), _RESULT_SCHEMA) for p in parts]
            ).to_pylist()
            for j, i in dups:
                d = Duplicate(keys[i], int(reps[i]), file_of[j], file_of[i])
                (identical if numbers[i] == numbers[j] else conflicts).append(d)
            keep = sorted(first.values())
            table = table.take(pa.array(keep, type=pa.int64()))
        return ReplicaRows(table.select(want_cols), identical, conflicts)

    # -- events ---------------------------------------------------------------------
    def append_events(self, events: list[dict]) -> None:
        if not events:
            return
        self._guard()
        lines = "".join(json.dumps(e, sort_keys=True, default=str) + "\n" for e in events)
        with open(self.events_file, "a", encoding="utf-8") as fh:
            fh.write(lines)
            fh.flush()
            os.fsync(fh.fileno())

    def tail_events(self, max_bytes: int = 1 << 20) -> list[dict]:
        """The events in the last ``max_bytes`` of the log (complete lines only)."""
        try:
            with open(self.events_file, "rb") as fh:
                size = fh.seek(0, os.SEEK_END)
                fh.seek(max(0, size - max_bytes))
                data = fh.read()
        except OSError:
            return []
        lines = data.split(b"\n")
        if len(data) < size:
            lines = lines[1:]  # the first line was cut
        out = []
        for line in lines:
            with contextlib.suppress(ValueError):
                if line.strip():
                    out.append(json.loads(line))
        return out

    def last_event(self) -> dict | None:
        ev = self.tail_events(1 << 16)
        return ev[-1] if ev else None

    def last_event_time(self, kind: str):
        """When the last event of ``kind`` in the log's last megabyte happened (a pandas
        UTC timestamp), or ``None``."""
        import pandas as pd

        for e in reversed(self.tail_events()):
            if e.get("event") == kind and e.get("time"):
                with contextlib.suppress(ValueError, TypeError):
                    return pd.Timestamp(e["time"]).tz_convert("UTC")
        return None

    def read_events(self) -> list[dict]:
        if not self.events_file.exists():
            return []
        out = []
        for line in self.events_file.read_text(encoding="utf-8", errors="replace").splitlines():
            with contextlib.suppress(json.JSONDecodeError):
                out.append(json.loads(line))
        return out

    # -- checkpoints ----------------------------------------------------------------
    def checkpoint_path(self, point_short: str, replica: int) -> Path:
        return self.checkpoints_dir / point_short / f"r{replica:06d}.ckpt"


_RESULT_SCHEMA = pa.schema([REPLICA_SCHEMA.field(c) for c in RESULT_COLUMNS])


def _read_part(path: Path, columns: list[str] | None, want: pa.Schema) -> pa.Table:
    """One part file read and cast to the pinned schema (``want``, in its column order)."""
    try:
        pf = pq.ParquetFile(path)
        have = set(pf.schema_arrow.names)
        added = [c for c in want.names if c not in have and c in ADDED_COLUMNS]
        cols = [c for c in want.names if c not in added]
        table = pf.read(columns=cols)
        for c in added:  # written before the column existed
            table = table.append_column(want.field(c), pa.nulls(table.num_rows, want.field(c).type))
        table = table.select(want.names)
        return table if table.schema.equals(want) else table.cast(want)
    except (OSError, KeyError, ValueError, pa.ArrowException) as exc:
        raise StoreIntegrityError(
            f"{path}: not a readable replica table of this store ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else ''}); see `sweepctl audit`, and "
            "move the file out of replicas/ if it does not belong there"
        ) from None
