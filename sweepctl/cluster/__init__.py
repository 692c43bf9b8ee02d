"""Batch systems: profiles (dask-jobqueue), job scripts, per-store TLS."""

from sweepctl.cluster.batch import (
    ProfileError,
    ensure_certificates,
    job_script,
    load_profile,
    make_cluster,
    make_security,
    parse_duration,
)
from sweepctl.cluster.watch import job_end_state, prune_dead_jobs

__all__ = [
    "ProfileError",
    "ensure_certificates",
    "job_end_state",
    "job_script",
    "load_profile",
    "make_cluster",
    "make_security",
    "parse_duration",
    "prune_dead_jobs",
]
