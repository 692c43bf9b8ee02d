"""Asking the batch system about a campaign's jobs: the watchdog's query and end states.

Admins of shared clusters ask that tools query the controller rarely and in bulk: the
watchdog lists *all* of the user's jobs with one command per poll, at most once every
:data:`WATCHDOG_SECONDS`, and picks the campaign's jobs out of the listing. A query that
fails or times out says nothing about the jobs ("unknown"): they are kept, never counted
as dead, so adaptive scaling never submits replacements for live jobs (and never exceeds
``max_jobs``).
"""

from __future__ import annotations

import getpass
import re
import subprocess
from collections.abc import Iterable
from pathlib import Path

__all__ = [
    "ENDED_STATES",
    "WATCHDOG_SECONDS",
    "job_end_state",
    "list_jobs",
    "parse_listing",
    "prune_dead_jobs",
]

#: The least time between two watchdog queries of the batch system (seconds).
WATCHDOG_SECONDS = 30.0
#: How long one query may take before its answer counts as unknown (seconds).
QUERY_TIMEOUT = 20.0

#: States in which a job has ended (Slurm, PBS, SGE, LSF spellings).
ENDED_STATES = frozenset(
    {
        "COMPLETED",
        "CANCELLED",
        "FAILED",
        "TIMEOUT",
        "PREEMPTED",
        "NODE_FAIL",
        "BOOT_FAIL",
        "OUT_OF_MEMORY",
        "DEADLINE",
        "DONE",
        "EXIT",
        "F",  # PBS Pro finished (qstat -x)
        "C",  # Torque completed
    }
)


def _user() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # pragma: no cover - no passwd entry
        return ""


def listing_command(system: str, user: str | None = None) -> list[str]:
    """The one command that lists all of ``user``'s jobs with their states."""
    u = user if user is not None else _user()
    return {
        "slurm": ["squeue", "-h", "-u", u, "-o", "%i %T"],
        "pbs": ["qstat", "-u", u],
        "sge": ["qstat", "-u", u],
        "lsf": ["bjobs", "-noheader", "-a", "-u", u],
    }[system]


_PBS_ID = re.compile(r"^(\d+(?:\[\d*\])?)(\.\S*)?$")


def parse_listing(system: str, text: str) -> dict[str, str]:
    """``{job id: state}`` from the listing command's output (header lines skipped)."""
    out: dict[str, str] = {}
    for line in text.splitlines():
        tok = line.split()
        if not tok:
            continue
        if system == "slurm" and len(tok) >= 2:
            out[tok[0]] = tok[1]
        elif system == "pbs" and _PBS_ID.match(tok[0]) and len(tok) >= 10:
            # server: Job ID, Username, Queue, Jobname, SessID, NDS, TSK, Mem, Time, S, Elap
            jid = _PBS_ID.match(tok[0]).group(1)
            out[jid] = tok[9]
        elif system == "sge" and tok[0].isdigit() and len(tok) >= 5:
            # job-ID prior name user state submit/start-at queue slots
            out[tok[0]] = tok[4]
        elif system == "lsf" and tok[0].isdigit() and len(tok) >= 3:
            # JOBID USER STAT QUEUE FROM_HOST EXEC_HOST JOB_NAME SUBMIT_TIME
            out[tok[0]] = tok[2]
    return out


def _short(job_id: str) -> str:
    """``1234.server`` (PBS) → ``1234``; Slurm, SGE and LSF ids are plain numbers."""
    return str(job_id).split(".", 1)[0]


def list_jobs(
    system: str, timeout: float = QUERY_TIMEOUT, user: str | None = None
) -> dict[str, str] | None:
    """One query of the batch system: ``{job id: state}`` of the user's jobs, or ``None``
    when the query failed or timed out (nothing is known then)."""
    cmd = listing_command(system, user)
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except (OSError, subprocess.SubprocessError):
        return None
    if proc.returncode != 0:
        return None
    return parse_listing(system, proc.stdout)


def job_states(
    system: str, job_ids: Iterable[str], listing: dict[str, str] | None
) -> dict[str, str]:
    """``alive``, ``ended`` or ``unknown`` for each job, from one listing.

    A job the listing does not show has left the queue (ended); a failed listing
    (``None``) makes every job unknown.
    """
    ids = [str(j) for j in job_ids]
    if listing is None:
        return dict.fromkeys(ids, "unknown")
    short = {_short(k): v for k, v in listing.items()}
    out = {}
    for j in ids:
        state = short.get(_short(j))
        out[j] = "ended" if state is None or state.upper() in ENDED_STATES else "alive"
    return out


def prune_dead_jobs(cluster, system: str, timeout: float = QUERY_TIMEOUT) -> list[str] | None:
    """Forget worker jobs the batch system has ended (scancel, walltime, preemption).

    dask-jobqueue does not notice jobs that end behind its back, so adaptive scaling
    would keep counting them and never ask for replacements; forgetting them lets it
    submit new ones (never more than ``max_jobs`` at once). One query for all jobs.
    Returns the job ids dropped, or ``None`` if the batch system did not answer (then
    nothing is dropped).
    """
    jobs = {
        name: str(job.job_id)
        for name, job in list(getattr(cluster, "workers", {}).items())
        if getattr(job, "job_id", None)
    }
    if not jobs:
        return []
    states = job_states(system, jobs.values(), list_jobs(system, timeout))
    if any(s == "unknown" for s in states.values()):
        return None
    dropped = []
    for name, jid in jobs.items():
        if states[jid] == "ended":
            cluster.worker_spec.pop(name, None)
            cluster.workers.pop(name, None)
            dropped.append(jid)
    return dropped


# ------------------------------------------------------------------ Slurm end states


def _run(cmd: list[str], timeout: float = QUERY_TIMEOUT) -> str | None:
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except (OSError, subprocess.SubprocessError):
        return None
    return proc.stdout if proc.returncode == 0 else None


def slurm_config() -> dict[str, str]:
    """``scontrol show config`` as a dict (empty if Slurm does not answer)."""
    out = _run(["scontrol", "show", "config"]) or ""
    conf = {}
    for line in out.splitlines():
        k, sep, v = line.partition("=")
        if sep:
            conf[k.strip()] = v.strip()
    return conf


def job_end_state(job_id: str) -> str | None:
    """How a Slurm job ended (``COMPLETED``, ``TIMEOUT``, …), asked of Slurm itself.

    In order: accounting (``sacct``), the controller's memory (``scontrol show job``,
    which keeps ended jobs for ``MinJobAge``), and the job-completion log wherever
    ``scontrol show config`` says it is (``JobCompType=jobcomp/filetxt``). ``None``
    while the job has not ended, or when Slurm keeps no record of it.
    """
    jid = str(job_id)
    out = _run(["sacct", "-n", "-X", "-P", "-j", jid, "-o", "State"])
    if out and out.split():
        state = out.split()[0].rstrip("+")
        return state if state in ENDED_STATES else None
    out = _run(["scontrol", "show", "job", jid])
    if out:
        m = re.search(r"\bJobState=(\S+)", out)
        if m:
            return m.group(1) if m.group(1) in ENDED_STATES else None
    conf = slurm_config()
    if conf.get("JobCompType") == "jobcomp/filetxt" and conf.get("JobCompLoc"):
        try:
            text = Path(conf["JobCompLoc"]).read_text(errors="replace")
        except OSError:
            return None
        for line in reversed(text.splitlines()):
            if re.search(rf"\bJobId={re.escape(jid)}\b", line):
                m = re.search(r"\bJobState=(\S+)", line)
                return m.group(1) if m else None
    return None
