"""Self-continuing allocations: the job scripts as text, and the rules that end a chain.

The rules run the real ``sweepctl cluster submit / link / stop`` commands against a
batch system of small shell scripts (``conftest.fake_slurm``) that records every
submission and cancellation; the live chain on a real Slurm is in tests/slurm.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from sweepctl.cluster import load_profile
from sweepctl.cluster.chain import link_script, read_links
from tests.campaign.helpers import cli, write_recipe
from tests.cluster.conftest import log_lines

EXAMPLES = Path(__file__).resolve().parents[2] / "deploy" / "clusters.example.toml"


@pytest.mark.parametrize(
    ("name", "directives"),
    [
        ("slurm-standard", ["#SBATCH -t 24:00:00", "#SBATCH -p standard", "#SBATCH -A phys-qh"]),
        ("pbs-long", ["#PBS -l walltime=48:00:00", "#PBS -q long", "#PBS -A qh2026"]),
        ("sge-short", ["#$ -l h_rt=04:00:00", "#$ -q short.q", "#$ -P qhall", "#$ -pe smp 16"]),
        ("lsf-normal", ["#BSUB -W 12:00", "#BSUB -q normal", '#BSUB -P "qh-project"']),
    ],
)
def test_link_scripts_of_each_batch_system(name, directives, tmp_path):
    p = load_profile(name, EXAMPLES)
    store = tmp_path / "my store"
    text = link_script(p, store)
    for d in directives:
        assert d in text, (d, text)
    assert f"sweepctl-chain-{name}" in text  # the job name
    assert str(store / "allocations") in text  # the links' output goes to the store
    for line in p.prologue:
        assert line in text
    last = text.strip().splitlines()[-1]
    assert last == f"exec python3 -m sweepctl cluster link '{store}'"
    # the prologue comes after every directive and before the link
    lines = text.splitlines()
    directive = {"slurm": "#SBATCH", "pbs": "#PBS", "sge": "#$", "lsf": "#BSUB"}[p.system]
    last_directive = max(i for i, ln in enumerate(lines) if ln.startswith(directive))
    assert all(lines.index(pl) > last_directive for pl in p.prologue)


def profile(tmp_path: Path) -> Path:
    f = tmp_path / "clusters.toml"
    f.write_text(
        '[profiles.t]\nsystem = "slurm"\ncores = 2\nprocesses = 2\nwalltime = "00:01:00"\n'
        'stop_margin = "40s"\n'
    )
    return f


def submit(tmp_path, store):
    recipe = write_recipe(tmp_path / "r.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    proc = cli(
        "cluster",
        "submit",
        recipe,
        "--store",
        store,
        "--cluster",
        "t",
        "--profiles",
        profile(tmp_path),
    )
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return proc


def test_submit_writes_the_chain_and_stop_cancels_it(fake_slurm, tmp_path):
    store = tmp_path / "store"
    proc = submit(tmp_path, store)
    assert "submitted job 1" in proc.stdout and "sweepctl cluster stop" in proc.stdout
    (sub,) = log_lines(fake_slurm, "submit")
    assert sub.endswith(str(store / "allocations" / "link.sh"))
    cfg = json.loads((store / "allocations" / "chain.json").read_text())
    assert (cfg["walltime_seconds"], cfg["stop_margin_seconds"], cfg["workers"]) == (60, 40, 2)
    proc = cli("cluster", "stop", store)
    assert proc.returncode == 0, proc.stderr
    assert log_lines(fake_slurm, "cancel") == ["cancel 1"]
    # a link that starts after the stop ends at once and submits nobody
    proc = cli("cluster", "link", "--store", store, env={"SLURM_JOB_ID": "1"})
    assert proc.returncode == 0 and "stopped" in proc.stdout, proc.stdout + proc.stderr
    assert len(log_lines(fake_slurm, "submit")) == 1
    assert read_links(store)[-1]["outcome"] == "stopped"
    assert "job 1 stopped" in cli("status", store).stdout.replace("\n", " ")


def test_two_links_without_progress_stop_the_chain(fake_slurm, tmp_path):
    store = tmp_path / "store"
    submit(tmp_path, store)
    # two earlier links that started with the same number of stored rows: the first
    # made no progress; this third start shows the second made none either
    with open(store / "allocations" / "links.jsonl", "a") as fh:
        for j in ("1", "2"):
            fh.write(json.dumps({"event": "link-start", "job": j, "rows": 0}) + "\n")
            fh.write(json.dumps({"event": "link-end", "job": j, "outcome": "continued"}) + "\n")
    proc = cli("cluster", "link", "--store", store, env={"SLURM_JOB_ID": "3"})
    assert proc.returncode == 1, proc.stdout + proc.stderr
    end = read_links(store)[-1]
    assert end["outcome"] == "no-progress" and "no new replica" in end["message"]
    assert len(log_lines(fake_slurm, "submit")) == 1  # nothing resubmitted
    assert not (store / "replicas").exists()  # and no driver ran


def test_bad_stop_margin_is_refused_before_submitting(fake_slurm, tmp_path):
    recipe = write_recipe(tmp_path / "r.toml")
    proc = cli(
        "cluster",
        "submit",
        recipe,
        "--store",
        tmp_path / "s",
        "--cluster",
        "t",
        "--profiles",
        profile(tmp_path),
        "--stop-margin",
        "2m",
    )
    assert proc.returncode == 2 and "--stop-margin" in proc.stderr and "walltime" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert not log_lines(fake_slurm, "submit") and not (tmp_path / "s").exists()
