"""The campaign store: a directory with pinned Parquet schemas, written atomically.

Layout::

    STORE/
      campaign.json          frozen settings, recipe history, provenance (atomic rewrite)
      replicas/part-*.parquet replica rows (pinned schema), one file per driver batch
      events.jsonl           append-only log: run, submitted, started, resumed, finished, …
      checkpoints/           in-flight strip states, one file per replica (workers write
                             them atomically; the driver removes them once the row is in)
      lock                   pid + host of the driver that owns the store
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
import signal
import socket
import subprocess
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
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


def _try_flock(fd: int) -> bool | None:
    """``True`` if the exclusive flock was taken, ``False`` if another process holds it,
    ``None`` if the file system has no flock."""
    import errno
    import fcntl

    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return False
    except OSError as exc:
        if exc.errno in (errno.ENOLCK, errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
            return None
        raise
    return True


def _same_file(fd: int, path: Path) -> bool:
    try:
        a, b = os.fstat(fd), os.stat(path)
    except OSError:
        return False
    return (a.st_dev, a.st_ino) == (b.st_dev, b.st_ino)


def _read_owner(fd: int) -> dict:
    with contextlib.suppress(OSError, ValueError):
        data = os.pread(fd, 4096, 0)
        owner = json.loads(data) if data.strip() else {}
        return owner if isinstance(owner, dict) else {}
    return {}


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


class Store:
    """A campaign store directory."""

    def __init__(self, root: str | Path) -> None:
        self.root = Path(root)
        self.campaign_file = self.root / "campaign.json"
        self.replicas_dir = self.root / "replicas"
        self.checkpoints_dir = self.root / "checkpoints"
        self.events_file = self.root / "events.jsonl"
        self.lock_file = self.root / "lock"
        self.merged_dir = self.root / "merged"
        self._locked = False
        self._lock_fd: int | None = None

    # -- existence ------------------------------------------------------------------
    def exists(self) -> bool:
        return self.campaign_file.is_file()

    def foreign_entries(self) -> list[Path]:
        """Entries of the directory that sweepctl did not put there (before creation:
        the lock, TLS certificates, scheduler files and batch logs are its own)."""
        if not self.root.exists():
            return []
        own = {"lock", "lock.takeover", "tls", "batch-logs"}
        return [
            p
            for p in self.root.iterdir()
            if p.name not in own and not (p.name.startswith("scheduler") and p.suffix == ".json")
        ]

    def require(self) -> None:
        """Raise a clear error unless this is a store."""
        if not self.root.exists():
            raise StoreError(f"{self.root}: no such directory; give the --store of a campaign")
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
        atomic_write_bytes(self.campaign_file, (json.dumps(campaign, indent=2) + "\n").encode())

    # -- lock -----------------------------------------------------------------------
    @contextlib.contextmanager
    def locked(self) -> Iterator[None]:
        """Own the store for the duration (a second driver is refused)."""
        self.acquire_lock()
        try:
            yield
        finally:
            self.release_lock()

    def acquire_lock(self) -> dict | None:
        """Take the store's lock; returns the dead previous owner's record, if any.

        The lock is an exclusive ``flock`` on ``STORE/lock``, held for the driver's
        lifetime: the kernel drops it when the process dies however it dies, so a crash
        at any moment (also between creating the file and writing the owner's record)
        leaves no lock behind, and two drivers can never both take over a dead one's
        lock. Where the file system has no ``flock``, :meth:`_acquire_by_link` is the
        fallback.
        """
        host = socket.gethostname()
        me = {"pid": os.getpid(), "host": host, "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        for _ in range(20):
            fd = os.open(self.lock_file, os.O_RDWR | os.O_CREAT, 0o644)
            try:
                locked = _try_flock(fd)
                if locked is None:  # no flock on this file system
                    os.close(fd)
                    return self._acquire_by_link(me)
                if locked is False:
                    raise StoreLocked(self._locked_message(_read_owner(fd)))
                if not _same_file(fd, self.lock_file):
                    os.close(fd)  # released and removed meanwhile: try the new file
                    continue
                previous = _read_owner(fd)
                pid = previous.get("pid")
                if previous.get("host") not in (None, host) or (
                    isinstance(pid, int) and pid != os.getpid() and _pid_alive(pid)
                ):
                    # flock on a network file system may be local to one node, and a
                    # driver of an older version holds none: never take over from another
                    # host, or from a live process, on the flock's word alone
                    raise StoreLocked(self._locked_message(previous))
                os.ftruncate(fd, 0)
                os.pwrite(fd, json.dumps(me).encode(), 0)
                os.fsync(fd)
            except BaseException:
                with contextlib.suppress(OSError):
                    os.close(fd)
                raise
            self._lock_fd = fd
            self._locked = True
            return previous or None
        raise StoreLocked(f"could not take the lock {self.lock_file}")  # pragma: no cover

    def _acquire_by_link(self, me: dict) -> dict | None:
        """Lock without flock: the record is written to a temporary and hard-linked into
        place (atomic, never empty); a dead owner on this host is taken over while holding
        ``lock.takeover`` (``mkdir`` is atomic), so two drivers cannot both take over."""
        tmp = self.root / f".lock.tmp-{uuid.uuid4().hex[:8]}"
        tmp.write_text(json.dumps(me))
        previous = None
        try:
            for _ in range(3):
                try:
                    os.link(tmp, self.lock_file)
                except FileExistsError:
                    other = _read_json(self.lock_file)
                    pid = other.get("pid")
                    dead = isinstance(pid, int) and not _pid_alive(pid)
                    if other.get("host") != me["host"] or not dead:
                        raise StoreLocked(self._locked_message(other)) from None
                    guard = self.root / "lock.takeover"
                    try:
                        guard.mkdir()
                    except FileExistsError:
                        raise StoreLocked(
                            f"another driver is taking over {self.lock_file}; try again, or "
                            f"remove {guard} if no driver is starting"
                        ) from None
                    try:
                        if _read_json(self.lock_file) == other:
                            self.lock_file.unlink()
                            previous = other
                    finally:
                        guard.rmdir()
                    continue
                self._locked = True
                return previous
        finally:
            with contextlib.suppress(OSError):
                tmp.unlink()
        raise StoreLocked(f"could not take the lock {self.lock_file}")  # pragma: no cover

    def _locked_message(self, other: dict) -> str:
        pid, ohost = other.get("pid"), other.get("host")
        return (
            f"{self.root} is in use by the driver with pid {pid} on host {ohost} "
            f"(since {other.get('since')}); wait for it to finish, or if that driver is dead "
            f"on another host, remove {self.lock_file}"
        )

    def release_lock(self) -> None:
        if not self._locked:
            return
        fd, self._lock_fd = self._lock_fd, None
        # Remove the file while still holding the flock; a driver that opened it just
        # before sees, after getting the flock, that the path now names another file.
        with contextlib.suppress(OSError):
            if fd is None or _same_file(fd, self.lock_file):
                if fd is not None or _read_json(self.lock_file).get("pid") == os.getpid():
                    self.lock_file.unlink()
        if fd is not None:
            with contextlib.suppress(OSError):
                os.close(fd)
        self._locked = False

    # -- repairs after a kill (lock held) ------------------------------------------------
    def cleanup(self) -> list[Path]:
        """Remove temporaries left by a killed writer; mend a torn last event line."""
        removed = []
        for d in (self.root, self.replicas_dir, self.checkpoints_dir, self.merged_dir):
            if d.is_dir():
                for p in d.rglob(".*.tmp-*"):
                    with contextlib.suppress(OSError):
                        p.unlink()
                        removed.append(p)
        if self.events_file.exists():
            data = self.events_file.read_bytes()
            if data and not data.endswith(b"\n"):
                cut = data.rfind(b"\n") + 1
                with open(self.events_file, "r+b") as fh:
                    fh.truncate(cut)
        return removed

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
        tmp = self.replicas_dir / f".{name}.tmp-{uuid.uuid4().hex[:8]}"
        pq.write_table(table, tmp, compression="zstd")
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        if os.environ.get("SWEEPCTL_FAULT") == "kill-while-writing":
            os.kill(os.getpid(), signal.SIGKILL)  # fault-injection hook for tests
        os.replace(tmp, final)
        _fsync_dir(self.replicas_dir)
        return final

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
        lines = "".join(json.dumps(e, sort_keys=True, default=str) + "\n" for e in events)
        with open(self.events_file, "a", encoding="utf-8") as fh:
            fh.write(lines)
            fh.flush()
            os.fsync(fh.fileno())

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
