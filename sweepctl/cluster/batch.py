"""Batch-system clusters through dask-jobqueue: profiles, job scripts, TLS.

A *profile* names a batch system and how to ask it for workers. Profiles live in a
TOML file (examples in ``deploy/clusters.example.toml``)::

    [profiles.mycluster]
    system = "slurm"              # slurm | pbs | sge | lsf
    cores = 32                    # cores per job
    processes = 32                # single-threaded worker processes per job
    memory = "120GB"
    walltime = "24:00:00"
    queue = "standard"            # partition / queue
    account = "phys123"
    prologue = ["module load python/3.11", "source ~/venvs/sweepctl/bin/activate"]
    interface = "ib0"
    min_jobs = 0
    max_jobs = 10

Precedence: command-line options > the user's profile > packaged defaults
(``sweepctl/data/cluster-defaults.toml``). Workers retire ``lifetime_margin`` before
the walltime, staggered so that they do not all leave at once; replicas in flight
continue elsewhere from their checkpoints.
"""

from __future__ import annotations

import os
import re
import subprocess
import tomllib
from dataclasses import dataclass, field, fields
from importlib import resources
from pathlib import Path
from typing import Any

from sweepctl.cluster.watch import WATCHDOG_SECONDS, prune_dead_jobs
from sweepctl.errors import SweepctlError

__all__ = [
    "Profile",
    "ProfileError",
    "ensure_certificates",
    "job_script",
    "load_profile",
    "make_cluster",
    "make_security",
    "parse_duration",
    "tls_files",
]

SYSTEMS = ("slurm", "pbs", "sge", "lsf")
_KEYS: dict[str, type | tuple] = {
    "system": str,
    "cores": int,
    "processes": int,
    "memory": str,
    "walltime": str,
    "queue": str,
    "account": str,
    "prologue": list,
    "directives": list,
    "interface": str,
    "min_jobs": int,
    "max_jobs": int,
    "lifetime_margin": str,
    "lifetime_stagger": str,
    "python": str,
    "local_directory": str,
    "scheduler_host": str,
    "replica_fraction": float,
    "stop_margin": str,
}


class ProfileError(SweepctlError):
    """A profile problem, naming the key and the fix."""


def parse_duration(text: str, what: str) -> int:
    """``"HH:MM:SS"``, ``"MM:SS"``, ``"90m"``, ``"2h"`` or ``"45s"`` → seconds."""
    t = str(text).strip()
    m = re.fullmatch(r"(\d+)\s*([smhd])", t)
    if m:
        return int(m.group(1)) * {"s": 1, "m": 60, "h": 3600, "d": 86400}[m.group(2)]
    parts = t.split(":")
    if 1 <= len(parts) <= 3 and all(p.isdigit() for p in parts):
        secs = 0
        for p in parts:
            secs = secs * 60 + int(p)
        return secs
    raise ProfileError(f'{what} = {text!r}: write HH:MM:SS (e.g. "24:00:00") or 90m / 2h')


def _hms(seconds: int) -> str:
    return f"{seconds // 3600:02d}:{(seconds % 3600) // 60:02d}:{seconds % 60:02d}"


@dataclass
class Profile:
    """A resolved profile (defaults, user file and overrides merged)."""

    name: str
    system: str
    cores: int
    processes: int
    memory: str
    walltime: str
    queue: str | None = None
    account: str | None = None
    prologue: list[str] = field(default_factory=list)
    directives: list[str] = field(default_factory=list)
    interface: str | None = None
    min_jobs: int = 0
    max_jobs: int = 1
    lifetime_margin: str = "10m"
    lifetime_stagger: str = "4m"
    python: str | None = None
    local_directory: str | None = None
    scheduler_host: str | None = None
    replica_fraction: float = 0.1
    stop_margin: str | None = None  # self-continuing allocations stop this long before

    @property
    def walltime_seconds(self) -> int:
        return parse_duration(self.walltime, f"profiles.{self.name}.walltime")

    @property
    def lifetime_seconds(self) -> int | None:
        """How long a worker lives: walltime minus the margin (at least a minute);
        ``None`` with ``lifetime_margin = "off"`` (the batch system ends the worker)."""
        if self.lifetime_margin == "off":
            return None
        margin = parse_duration(self.lifetime_margin, f"profiles.{self.name}.lifetime_margin")
        return max(60, self.walltime_seconds - margin)

    @property
    def stagger_seconds(self) -> int:
        return parse_duration(self.lifetime_stagger, f"profiles.{self.name}.lifetime_stagger")

    def replica_seconds(self) -> float:
        """Suggested replica duration: a fraction of the walltime."""
        return self.replica_fraction * self.walltime_seconds


def _packaged_defaults() -> dict:
    text = resources.files("sweepctl").joinpath("data/cluster-defaults.toml").read_text()
    return tomllib.loads(text)


def user_profiles_path(explicit: str | Path | None = None) -> Path | None:
    """The user's profile file: ``--profiles``, ``$SWEEPCTL_CLUSTERS`` or the config dir."""
    if explicit:
        return Path(explicit)
    env = os.environ.get("SWEEPCTL_CLUSTERS")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CONFIG_HOME") or os.path.join(os.path.expanduser("~"), ".config")
    p = Path(base) / "sweepctl" / "clusters.toml"
    return p if p.exists() else None


def _check(src: str, name: str, body: dict) -> dict:
    out = {}
    for k, v in body.items():
        where = f"{src}: profiles.{name}.{k}"
        if k not in _KEYS:
            raise ProfileError(f"{where} = {v!r}: unknown key; keys are {', '.join(sorted(_KEYS))}")
        want = _KEYS[k]
        if want is float and isinstance(v, int) and not isinstance(v, bool):
            v = float(v)
        if not isinstance(v, want) or isinstance(v, bool):
            raise ProfileError(f"{where} = {v!r}: must be {want.__name__}")
        if k in ("prologue", "directives") and not all(isinstance(x, str) for x in v):
            raise ProfileError(f"{where} = {v!r}: must be a list of strings")
        if k in ("cores", "processes", "max_jobs") and v < 1:
            raise ProfileError(f"{where} = {v!r}: must be at least 1")
        if k == "min_jobs" and v < 0:
            raise ProfileError(f"{where} = {v!r}: must be at least 0")
        if k == "system" and v not in SYSTEMS:
            raise ProfileError(f"{where} = {v!r}: must be one of {', '.join(SYSTEMS)}")
        if k in ("walltime", "lifetime_margin", "lifetime_stagger", "stop_margin") and not (
            k == "lifetime_margin" and v == "off"
        ):
            parse_duration(v, where)
        if k == "replica_fraction" and not 0 < v <= 0.5:
            raise ProfileError(f"{where} = {v!r}: must lie in (0, 0.5]")
        out[k] = v
    return out


def load_profile(
    name: str, profiles_file: str | Path | None = None, overrides: dict[str, Any] | None = None
) -> Profile:
    """Resolve profile ``name``: overrides > user file > packaged defaults."""
    defaults = _packaged_defaults()
    path = user_profiles_path(profiles_file)
    user: dict = {}
    src = str(path) if path else "profiles"
    if path is not None:
        try:
            user = tomllib.loads(path.read_text())
        except FileNotFoundError:
            raise ProfileError(
                f"{path}: no such profile file; see deploy/clusters.example.toml"
            ) from None
        except tomllib.TOMLDecodeError as exc:
            raise ProfileError(f"{path}: {exc}; fix the TOML syntax") from None
    profiles = user.get("profiles", {})
    if name in profiles:
        body = _check(src, name, profiles[name])
    elif name in SYSTEMS:
        body = {"system": name}  # a bare system name uses the packaged defaults
    else:
        known = ", ".join(sorted(profiles)) or "none"
        raise ProfileError(
            f"{src}: no profile {name!r} (profiles there: {known}); add [profiles.{name}] "
            f"or use a system name ({', '.join(SYSTEMS)})"
        )
    if "system" not in body:
        raise ProfileError(f'{src}: profiles.{name}.system is missing; add system = "slurm"')
    merged = dict(defaults.get("all", {}))
    merged.update(defaults.get(body["system"], {}))
    merged.update(body)
    ov = {k: v for k, v in (overrides or {}).items() if v is not None}
    merged.update(_check("command line", name, ov))
    merged.setdefault("processes", merged.get("cores", 1))
    if merged["processes"] > merged["cores"]:
        raise ProfileError(
            f"{src}: profiles.{name}.processes = {merged['processes']}: more worker processes "
            f"than cores ({merged['cores']}); sweepctl workers are single-threaded"
        )
    if merged.get("min_jobs", 0) > merged.get("max_jobs", 1):
        raise ProfileError(f"{src}: profiles.{name}.min_jobs exceeds max_jobs; lower min_jobs")
    return Profile(name=name, **{k: v for k, v in merged.items() if k in _KEYS})


@dataclass
class ProfileRow:
    name: str
    system: str
    walltime: str
    cores: int
    max_jobs: int
    source: str


def list_profiles(profiles_file: str | Path | None = None) -> tuple[Path | None, list[ProfileRow]]:
    """Every profile of the user's file (resolved), then the bare system names."""
    path = user_profiles_path(profiles_file)
    names: list[str] = []
    if path is not None:
        try:
            names = list(tomllib.loads(path.read_text()).get("profiles", {}))
        except FileNotFoundError:
            raise ProfileError(
                f"{path}: no such profile file; see deploy/clusters.example.toml"
            ) from None
        except tomllib.TOMLDecodeError as exc:
            raise ProfileError(f"{path}: {exc}; fix the TOML syntax") from None
    rows = []
    for n in [*names, *[s for s in SYSTEMS if s not in names]]:
        p = load_profile(n, path)
        src = str(path) if n in names else "packaged defaults"
        rows.append(ProfileRow(n, p.system, p.walltime, p.cores, p.max_jobs, src))
    return path, rows


def _plain(value: Any) -> str:
    """A setting as a user would write it, not as Python prints it."""
    if value is None:
        return "(not set)"
    if isinstance(value, (list, tuple)):
        return "; ".join(str(v) for v in value) if value else "(none)"
    return str(value)


def describe_profile(p: Profile) -> list[tuple[str, str]]:
    """A resolved profile as (setting, value) lines, with the derived worker lifetime."""
    out = [(f.name, _plain(getattr(p, f.name))) for f in fields(p)]
    life = p.lifetime_seconds
    out.append(("worker lifetime", "until the walltime" if life is None else f"{life} s"))
    out.append(("replica seconds", f"{p.replica_seconds():.0f} (suggested replica duration)"))
    return out


def _job_kwargs(p: Profile) -> dict:
    kw: dict[str, Any] = {
        "cores": p.cores,
        "processes": p.processes,
        "memory": p.memory,
        "walltime": _hms(p.walltime_seconds) if p.system != "lsf" else _lsf_walltime(p),
        "job_script_prologue": list(p.prologue),
        "job_extra_directives": list(p.directives),
        "worker_extra_args": [],
        "name": f"sweepctl-{p.name}",
        "job_name": f"sweepctl-{p.name}",
    }
    if p.lifetime_seconds is not None:
        kw["worker_extra_args"] = [
            "--lifetime",
            f"{p.lifetime_seconds}s",
            "--lifetime-stagger",
            f"{p.stagger_seconds}s",
        ]
    if p.queue:
        kw["queue"] = p.queue
    if p.account:
        kw["account" if p.system in ("slurm", "pbs") else "project"] = p.account
    if p.interface:
        kw["interface"] = p.interface
    if p.python:
        kw["python"] = p.python
    if p.local_directory:
        kw["local_directory"] = p.local_directory
    return kw


def _lsf_walltime(p: Profile) -> str:
    m = p.walltime_seconds // 60
    return f"{m // 60:02d}:{m % 60:02d}"


def _classes(system: str):
    import dask_jobqueue as dj

    return {
        "slurm": (dj.SLURMCluster, dj.slurm.SLURMJob),
        "pbs": (dj.PBSCluster, dj.pbs.PBSJob),
        "sge": (dj.SGECluster, dj.sge.SGEJob),
        "lsf": (dj.LSFCluster, dj.lsf.LSFJob),
    }[system]


def job_script(p: Profile, scheduler: str = "tls://SCHEDULER-ADDRESS:PORT") -> str:
    """The job script a worker job of this profile would submit (nothing is started)."""
    _, job_cls = _classes(p.system)
    kw = _job_kwargs(p)
    kw.pop("interface", None)  # resolved on the login node only when a cluster starts
    return job_cls(scheduler=scheduler, **kw).job_script()


# -------------------------------------------------------------------------- TLS


def tls_files(store_root: Path) -> dict[str, Path]:
    d = store_root / "tls"
    return {"dir": d, "ca": d / "ca.pem", "cert": d / "node.pem", "key": d / "node-key.pem"}


def ensure_certificates(store_root: Path) -> dict[str, Path]:
    """Per-store CA and node certificate (openssl), keys readable by the owner only."""
    f = tls_files(store_root)
    if f["ca"].exists() and f["cert"].exists() and f["key"].exists():
        return f
    d = f["dir"]
    d.mkdir(mode=0o700, exist_ok=True)
    ca_key = d / "ca-key.pem"
    csr = d / "node.csr"
    old = os.umask(0o077)
    try:

        def ssl(*args: str) -> None:
            proc = subprocess.run(["openssl", *args], capture_output=True, text=True)
            if proc.returncode != 0:
                raise SweepctlError(
                    f"openssl {' '.join(args[:2])} failed (exit {proc.returncode}): "
                    f"{proc.stderr.strip()[:300]}"
                )

        ssl(
            "req",
            "-x509",
            "-newkey",
            "rsa:3072",
            "-nodes",
            "-keyout",
            str(ca_key),
            "-out",
            str(f["ca"]),
            "-days",
            "3650",
            "-subj",
            "/CN=sweepctl campaign CA",
        )
        ssl(
            "req",
            "-newkey",
            "rsa:3072",
            "-nodes",
            "-keyout",
            str(f["key"]),
            "-out",
            str(csr),
            "-subj",
            "/CN=sweepctl campaign node",
        )
        ssl(
            "x509",
            "-req",
            "-in",
            str(csr),
            "-CA",
            str(f["ca"]),
            "-CAkey",
            str(ca_key),
            "-CAcreateserial",
            "-out",
            str(f["cert"]),
            "-days",
            "3650",
        )
    finally:
        os.umask(old)
    for p in (ca_key, f["key"]):
        p.chmod(0o600)
    csr.unlink(missing_ok=True)
    return f


def make_security(store_root: Path):
    """A ``distributed.Security`` that requires TLS with this store's certificates."""
    from distributed.security import Security

    f = ensure_certificates(store_root)
    return Security(
        tls_ca_file=str(f["ca"]),
        tls_client_cert=str(f["cert"]),
        tls_client_key=str(f["key"]),
        tls_scheduler_cert=str(f["cert"]),
        tls_scheduler_key=str(f["key"]),
        tls_worker_cert=str(f["cert"]),
        tls_worker_key=str(f["key"]),
        require_encryption=True,
    )


def make_cluster(p: Profile, store_root: Path, dashboard: str | None = None):
    """Start a dask-jobqueue cluster for profile ``p`` (TLS, adaptive between min and max
    jobs); ``dashboard``: ``HOST:PORT`` for the scheduler's dashboard (off by default)."""
    cls, _ = _classes(p.system)
    kw = _job_kwargs(p)
    kw["security"] = make_security(store_root)
    kw["protocol"] = "tls://"
    # The scheduler always serves HTTP (health routes, the dashboard if bokeh is
    # installed); without --dashboard keep it on a free loopback port, not 8787.
    sched = {"dashboard_address": dashboard or "127.0.0.1:0"}
    if p.scheduler_host:
        sched["host"] = p.scheduler_host
    kw["scheduler_options"] = sched
    kw["log_directory"] = str(store_root / "batch-logs")
    cluster = cls(**kw)
    # for the driver's watchdog, which must not import this layer
    cluster.sweepctl_prune = lambda: prune_dead_jobs(cluster, p.system)
    cluster.sweepctl_poll_seconds = WATCHDOG_SECONDS
    cluster.adapt(minimum_jobs=p.min_jobs, maximum_jobs=p.max_jobs)
    return cluster
