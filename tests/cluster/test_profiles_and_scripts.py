"""Batch-system profiles and the job scripts they produce, tested as text."""

from __future__ import annotations

from pathlib import Path

import pytest

from sweepctl.cluster import ProfileError, job_script, load_profile, parse_duration

EXAMPLES = Path(__file__).resolve().parents[2] / "deploy" / "clusters.example.toml"


@pytest.mark.parametrize(
    ("name", "directives"),
    [
        (
            "slurm-standard",
            [
                "#SBATCH -t 24:00:00",
                "#SBATCH -p standard",
                "#SBATCH -A phys-qh",
                "#SBATCH --cpus-per-task=32",
                "#SBATCH --mem=112G",
            ],
        ),
        ("pbs-long", ["#PBS -l walltime=48:00:00", "#PBS -q long", "#PBS -A qh2026"]),
        ("sge-short", ["#$ -l h_rt=04:00:00", "#$ -q short.q", "#$ -P qhall", "#$ -pe smp 16"]),
        (
            "lsf-normal",
            ["#BSUB -W 12:00", "#BSUB -q normal", '#BSUB -P "qh-project"', "#BSUB -n 20"],
        ),
    ],
)
def test_job_script_directives_prologue_lifetime(name, directives):
    p = load_profile(name, EXAMPLES)
    script = job_script(p, scheduler="tls://10.0.0.1:8786")
    for d in directives:
        assert d in script, (d, script)
    for line in p.prologue:
        assert line in script
    # workers retire 10 minutes before the walltime, staggered over 4 minutes
    assert f"--lifetime {p.walltime_seconds - 600}s" in script
    assert "--lifetime-stagger 240s" in script
    assert f"--nworkers {p.processes}" in script and "--nthreads 1" in script
    assert script.count("--lifetime ") == 1
    assert f"-J sweepctl-{name}" in script or f"-N sweepctl-{name}" in script
    assert "tls://10.0.0.1:8786" in script


def test_precedence_command_line_over_file_over_defaults(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text('[profiles.x]\nsystem = "slurm"\nwalltime = "02:00:00"\nmax_jobs = 3\n')
    p = load_profile("x", f)
    assert (p.walltime, p.max_jobs, p.memory) == ("02:00:00", 3, "4GB")  # memory: packaged
    q = load_profile("x", f, {"walltime": "00:30:00", "max_jobs": None})
    assert (q.walltime, q.max_jobs) == ("00:30:00", 3)
    assert load_profile("pbs").system == "pbs"  # a bare system name: packaged defaults


@pytest.mark.parametrize(
    ("body", "needle"),
    [
        ('system = "condor"', "profiles.x.system"),
        ('system = "slurm"\nwaltime = "01:00:00"', "profiles.x.waltime"),
        ('system = "slurm"\nwalltime = "one hour"', "walltime"),
        ('system = "slurm"\ncores = 0', "profiles.x.cores"),
        ('system = "slurm"\ncores = 4\nprocesses = 8', "processes"),
        ('system = "slurm"\nprologue = "module load x"', "profiles.x.prologue"),
        ("cores = 4", "system is missing"),
    ],
)
def test_profile_errors_name_the_key(body, needle, tmp_path):
    f = tmp_path / "c.toml"
    f.write_text(f"[profiles.x]\n{body}\n")
    with pytest.raises(ProfileError, match=needle.replace(".", r"\.")):
        load_profile("x", f)


def test_unknown_profile_lists_the_known_ones():
    with pytest.raises(ProfileError, match="slurm-standard"):
        load_profile("nope", EXAMPLES)


def test_parse_duration():
    assert parse_duration("24:00:00", "w") == 86400
    assert parse_duration("90m", "w") == 5400
    assert parse_duration("05:00", "w") == 300
    with pytest.raises(ProfileError):
        parse_duration("tomorrow", "w")
