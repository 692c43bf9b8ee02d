"""The watchdog's batch-system query: one listing per poll, failures mean "unknown".

A real dask-jobqueue SLURMCluster (real scheduler, adaptive scaling) talks to a batch
system made of small shell scripts, so the test can make the query fail on purpose.
"""

from __future__ import annotations

import time

import pytest

from sweepctl.cluster.watch import job_states, list_jobs, parse_listing, prune_dead_jobs
from tests.campaign.helpers import wait_until
from tests.cluster.conftest import log_lines


def test_failed_or_hung_query_is_unknown_and_never_exceeds_max_jobs(fake_slurm, tmp_path):
    from sweepctl.campaign.connect import _call
    from sweepctl.cluster import load_profile, make_cluster

    prof = tmp_path / "c.toml"
    prof.write_text(
        '[profiles.t]\nsystem = "slurm"\ncores = 1\nmemory = "1GB"\nwalltime = "00:10:00"\n'
        'min_jobs = 2\nmax_jobs = 2\ninterface = "lo"\n'
    )
    (tmp_path / "store").mkdir()
    cluster = make_cluster(load_profile("t", prof), tmp_path / "store")
    try:
        wait_until(lambda: len(log_lines(fake_slurm, "submit")) >= 2, 60, "two submissions")

        def prune(timeout=5.0):
            return cluster.sync(_call, lambda: prune_dead_jobs(cluster, "slurm", timeout))

        (fake_slurm / "listing").write_text("1 RUNNING\n2 PENDING\n")
        assert prune() == []
        for mode, timeout in (("fail", 5.0), ("hang", 1.0)):
            (fake_slurm / "mode").write_text(mode)
            queries = len(log_lines(fake_slurm, "query"))
            assert prune(timeout) is None  # unknown ...
            assert len(log_lines(fake_slurm, "query")) == queries + 1  # ... from one query
            assert sorted(j.job_id for j in cluster.workers.values()) == ["1", "2"]  # kept
        time.sleep(3)  # three adaptive rounds: nothing replaced jobs that are not dead
        assert len(log_lines(fake_slurm, "submit")) == 2
        # job 2 really ended: dropped, and exactly one replacement is submitted
        (fake_slurm / "mode").write_text("list")
        (fake_slurm / "listing").write_text("1 RUNNING\n")
        assert prune() == ["2"]
        wait_until(lambda: len(log_lines(fake_slurm, "submit")) >= 3, 60, "a replacement")
        time.sleep(2)
        assert len(log_lines(fake_slurm, "submit")) == 3
        assert sorted(j.job_id for j in cluster.workers.values()) == ["1", "3"]
    finally:
        cluster.close(timeout=20)


def test_the_listing_query_asks_once_for_all_of_the_users_jobs(fake_slurm):
    (fake_slurm / "listing").write_text("11 RUNNING\n12 COMPLETING\n13 PENDING\n")
    listing = list_jobs("slurm", user="alice")
    assert log_lines(fake_slurm, "query") == ["query -h -u alice -o %i %T"]
    st = job_states("slurm", ["11", "12", "14"], listing)
    assert st == {"11": "alive", "12": "alive", "14": "ended"}  # 14 left the queue
    assert job_states("slurm", ["11"], None) == {"11": "unknown"}


# Listings in each system's usual layout (written from the systems' documented columns).
PBS = """
server:
                                                            Req'd  Req'd   Elap
Job ID          Username Queue    Jobname    SessID NDS TSK Memory Time  S Time
--------------- -------- -------- ---------- ------ --- --- ------ ----- - -----
4711.server     alice    long     sweepctl-p  12345   1  24   96gb 48:00 R 01:02
4712.server     alice    long     sweepctl-p    --    1  24   96gb 48:00 Q   --
"""
SGE = """
job-ID  prior   name       user   state submit/start at     queue          slots ja-task-ID
-----------------------------------------------------------------------------------------
    301 0.55500 sweepctl-s alice  r     05/01/2026 10:00:00 short.q@node1  16
    302 0.00000 sweepctl-s alice  qw    05/01/2026 10:00:05                16
"""
LSF = """
501     alice   RUN   normal     login1      node7       sweepctl-l May  1 10:00
502     alice   PEND  normal     login1                  sweepctl-l May  1 10:00
503     alice   EXIT  normal     login1      node8       sweepctl-l May  1 09:00
"""


@pytest.mark.parametrize(
    ("system", "text", "want"),
    [
        ("pbs", PBS, {"4711": "R", "4712": "Q"}),
        ("sge", SGE, {"301": "r", "302": "qw"}),
        ("lsf", LSF, {"501": "RUN", "502": "PEND", "503": "EXIT"}),
    ],
)
def test_listings_of_pbs_sge_lsf(system, text, want):
    got = parse_listing(system, text)
    assert got == want
    ids = [*want, "999"]
    st = job_states(system, [f"{i}.server" if system == "pbs" else i for i in ids], got)
    ended = {k.split(".")[0] for k, v in st.items() if v == "ended"}
    assert ended == ({"999", "503"} if system == "lsf" else {"999"})
