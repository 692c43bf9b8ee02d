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
from functools import lru_cache
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from sweepctl import __version__
from sweepctl.errors import SweepctlError

__all__ = [
    "REPLICA_SCHEMA",
    "Store",
    "StoreError",
    "StoreLocked",
    "atomic_write_bytes",
    "code_version",
]

SCHEMA_VERSION = "replicas/1"
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
    ],
    metadata={"sweepctl.schema": SCHEMA_VERSION, "sweepctl.conventions": CONVENTIONS},
)


class StoreError(SweepctlError, RuntimeError):
    """A store that cannot be used as asked (message says why and what to do)."""


class StoreLocked(StoreError):
    """Another live driver owns the store."""


@lru_cache(maxsize=1)
def code_version() -> dict[str, str]:
    """sweepctl version and, for a git checkout, its commit (``-dirty`` if modified)."""
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
    import numpy

    return {
        "sweepctl_version": __version__,
        "git_commit": commit,
        "numpy_version": numpy.__version__,
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

    # -- existence ------------------------------------------------------------------
    def exists(self) -> bool:
        return self.campaign_file.is_file()

    def foreign_entries(self) -> list[Path]:
        """Entries of the directory that sweepctl did not put there (before creation:
        the lock, TLS certificates, scheduler files and batch logs are its own)."""
        if not self.root.exists():
            return []
        own = {"lock", "tls", "batch-logs"}
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

    def acquire_lock(self) -> None:
        host = socket.gethostname()
        me = {"pid": os.getpid(), "host": host, "since": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        for _ in range(2):
            try:
                fd = os.open(self.lock_file, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    other = json.loads(self.lock_file.read_text())
                except (OSError, json.JSONDecodeError):
                    other = {}
                pid, ohost = other.get("pid"), other.get("host")
                if ohost == host and isinstance(pid, int) and not _pid_alive(pid):
                    # The previous driver died (killed, node lost): take over.
                    with contextlib.suppress(FileNotFoundError):
                        self.lock_file.unlink()
                    continue
                raise StoreLocked(
                    f"{self.root} is in use by the driver with pid {pid} on host {ohost} "
                    f"(since {other.get('since')}); wait for it, or if it is dead on another "
                    f"host, remove {self.lock_file}"
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self._locked = True
            return
        raise StoreLocked(f"could not take the lock {self.lock_file}")  # pragma: no cover

    def release_lock(self) -> None:
        if not self._locked:
            return
        with contextlib.suppress(OSError, json.JSONDecodeError):
            if json.loads(self.lock_file.read_text()).get("pid") == os.getpid():
                self.lock_file.unlink()
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
        """All replica rows (pinned schema), in file order."""
        parts = self.part_files()
        if not parts:
            return (
                REPLICA_SCHEMA.empty_table()
                if columns is None
                else REPLICA_SCHEMA.empty_table().select(columns)
            )
        want = (
            REPLICA_SCHEMA
            if columns is None
            else pa.schema([REPLICA_SCHEMA.field(c) for c in columns])
        )
        # ParquetFile rather than read_table: the latter loads pyarrow.dataset and pandas
        # (~0.8 s), paid by every driver start.
        tables = [_read_part(p, columns, want) for p in parts]
        return pa.concat_tables(tables).replace_schema_metadata(None)

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


def _read_part(path: Path, columns: list[str] | None, want: pa.Schema) -> pa.Table:
    """One part file read and cast to the pinned schema (``want``, in its column order)."""
    table = pq.ParquetFile(path).read(columns=columns)
    table = table.select(want.names)
    return table if table.schema.equals(want) else table.cast(want)
