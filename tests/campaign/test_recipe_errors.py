"""Malformed recipes: one clear line naming field, value and fix; no traceback; store untouched."""

from __future__ import annotations

import re
import shutil

import pytest

from tests.campaign.helpers import cli, recipe_text, snapshot, write_recipe

BAD = [
    # (id, overrides or raw text, field expected in the message)
    ("unknown-section", "raw:[extra]\nfoo = 1\n", "extra"),
    ("unknown-key", {"axes": {"width": [4]}}, "axes.width"),
    ("widths-wrong-type", {"axes": {"widths": "4"}}, "axes.widths"),
    ("widths-empty", {"axes": {"widths": []}}, "axes.widths"),
    ("width-zero", {"axes": {"widths": [0]}}, "axes.widths[0]"),
    ("width-not-integer", {"axes": {"widths": [2.5]}}, "axes.widths[0]"),
    ("width-duplicate", {"axes": {"widths": [2, 2]}}, "axes.widths"),
    ("couplings-empty", {"axes": {"couplings": []}}, "axes.couplings"),
    (
        "couplings-range-reversed",
        {"axes": {"couplings": {"start": 0.2, "stop": -0.2, "num": 3}}},
        "axes.couplings.stop",
    ),
    (
        "couplings-range-incomplete",
        {"axes": {"couplings": {"start": 0.0, "stop": 0.2}}},
        "axes.couplings",
    ),
    ("couplings-duplicate", {"axes": {"couplings": [0.1, 0.1]}}, "axes.couplings"),
    (
        "couplings-range-out-of-bounds",
        {"axes": {"couplings": {"start": -20.0, "stop": 0.0, "num": 3}}},
        "axes.couplings.start",
    ),
    ("coupling-not-number", {"axes": {"couplings": ["zero"]}}, "axes.couplings[0]"),
    ("p-above-one", {"axes": {"disorder": [{"p": 1.5}]}}, "axes.disorder[0].p"),
    (
        "p-block-negative",
        {"axes": {"disorder": [{"p_block": -0.1, "p_open": 0.1}]}},
        "axes.disorder[0].p_block",
    ),
    (
        "p-sum-above-one",
        {"axes": {"disorder": [{"p_block": 0.6, "p_open": 0.6}]}},
        "axes.disorder[0]",
    ),
    ("p-and-p-block", {"axes": {"disorder": [{"p": 0.1, "p_block": 0.1}]}}, "axes.disorder[0]"),
    (
        "disorder-duplicate",
        {"axes": {"disorder": [{"p": 0.1}, {"p_block": 0.1, "p_open": 0.1}]}},
        "axes.disorder",
    ),
    ("epsilon-zero", {"axes": {"epsilon": [0.0]}}, "axes.epsilon[0]"),
    ("epsilon-too-large", {"axes": {"epsilon": [0.5]}}, "axes.epsilon[0]"),
    # [M2] tests/REFERENCES.md: below 1/cosh((ln(1e-3/eps) - 0.031)/2) = 9.57e-7 one
    # blocking column (0.031: the CholeskyQR reserve, kernel.schedule.ORTHO_RESERVE)
    # is beyond the QR schedule's accuracy; 1e-9 was measured 2.5 % off (9.7σ)
    ("epsilon-below-proven-accuracy", {"axes": {"epsilon": [1e-9]}}, "axes.epsilon[0]"),
    ("epsilon-just-below-bound", {"axes": {"epsilon": [9.5e-7]}}, "axes.epsilon[0]"),
    ("target-zero", {"precision": {"target": 0.0}}, "precision.target"),
    ("target-negative", {"precision": {"target": -0.01}}, "precision.target"),
    ("target-missing", {"precision": {"target": None}}, "precision.target"),
    ("cap-below-replica", {"precision": {"max_layers": 100}}, "precision.max_layers"),
    # one replica of 26 strips is fewer than the 51 strip values an error bar needs
    ("cap-below-strip-minimum", {"precision": {"max_layers": 600}}, "precision.max_layers"),
    ("strips-one", {"replica": {"strips": 1}}, "replica.strips"),
    ("layers-zero", {"replica": {"layers": 0}}, "replica.layers"),
    ("layers-and-duration", {"replica": {"duration_seconds": 60}}, "replica.duration_seconds"),
    ("warmup-negative", {"replica": {"warmup": -5}}, "replica.warmup"),
    ("name-missing", {"campaign": {"name": None}}, "campaign.name"),
    ("entropy-not-integer", {"campaign": {"entropy": '"xyz"'}}, "campaign.entropy"),
    # a goal on nu: both keys, each in its range, and slices that a scaling fit can use
    ("goal-halfwidth-missing", {"goal": {"cpu_hours": 10}}, "goal.nu_halfwidth"),
    ("goal-budget-missing", {"goal": {"nu_halfwidth": 0.05}}, "goal.cpu_hours"),
    ("goal-halfwidth-zero", {"goal": {"nu_halfwidth": 0.0, "cpu_hours": 10}}, "goal.nu_halfwidth"),
    ("goal-budget-negative", {"goal": {"nu_halfwidth": 0.05, "cpu_hours": -1}}, "goal.cpu_hours"),
    ("goal-unknown-key", {"goal": {"nu_width": 0.05}}, "goal.nu_width"),
    (
        "goal-one-width",
        {"axes": {"widths": [2]}, "goal": {"nu_halfwidth": 0.05, "cpu_hours": 10}},
        "axes.widths",
    ),
    (
        "goal-two-widths",  # two widths give only an effective exponent
        {"axes": {"widths": [2, 4]}, "goal": {"nu_halfwidth": 0.05, "cpu_hours": 10}},
        "at least 3 widths",
    ),
    # syntax errors lead with line and column; a file problem names the file once
    ("unreadable-toml", "raw:[axes\nwidths = [4", "line 1, column 6: TOML syntax"),
    ("not-utf8", "bytes", "not UTF-8"),
    # changes that would alter results already stored
    ("changed-replica-layers", {"replica": {"layers": 5000}}, "replica.layers"),
    ("changed-strips", {"replica": {"strips": 6}}, "replica.strips"),
    ("changed-warmup", {"replica": {"warmup": 40}}, "replica.warmup"),
    ("changed-entropy", {"campaign": {"entropy": "0x99"}}, "campaign.entropy"),
]


@pytest.fixture(scope="module")
def small_store(tmp_path_factory):
    d = tmp_path_factory.mktemp("small")
    recipe = write_recipe(d / "ok.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    store = d / "store"
    proc = cli("run", recipe, "--store", store, "--workers", "1")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return store


def test_at_least_twenty_distinct_cases():
    assert len({case[0] for case in BAD}) == len(BAD) >= 20


@pytest.mark.parametrize(("name", "bad", "field"), BAD, ids=[b[0] for b in BAD])
def test_malformed_recipe(name, bad, field, small_store, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(small_store, store)
    before = snapshot(store)
    path = tmp_path / f"{name}.toml"
    if bad == "bytes":
        path.write_bytes(b'[campaign]\nname = "\xff\xfe"\n')
    elif isinstance(bad, str):
        path.write_text(recipe_text() + "\n" + bad[4:] if name == "unknown-section" else bad[4:])
    else:
        write_recipe(path, bad)
    proc = cli("run", path, "--store", store)
    assert proc.returncode == 2, proc.stderr  # README: bad input exits 2
    assert "Traceback" not in proc.stderr + proc.stdout
    lines = [ln for ln in proc.stderr.strip().splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    line = lines[0]
    assert field in line, line
    # "<file>: <field> = <value>: <fix>" — the field, the value and the way out; a missing
    # key "<file>: <field> is missing: <fix>"; the file itself "<file>: <what>; <fix>"
    assert re.search(r"error: .+: (.+ = .+|.+ is missing|line \d+, column \d+): .+", line) or (
        name == "not-utf8" and re.search(r"error: [^:]+: .+; .+", line)
    ), line
    assert snapshot(store) == before  # nothing stored was touched


def test_messages_keep_their_table_names(tmp_path):
    # the console renders [name] as markup; a message naming a TOML table must keep it
    path = write_recipe(tmp_path / "r.toml", {"precision": {"target": None}})
    proc = cli("plan", path)
    assert proc.returncode == 2 and "under [precision]" in proc.stderr, proc.stderr


@pytest.mark.parametrize(
    ("overrides", "shown", "fix"),
    [
        # values are shown as TOML (an inline table, a quoted string), not as Python
        (
            {"axes": {"disorder": [{"p": 0.1, "p_block": 0.2}]}},
            "axes.disorder[0] = { p = 0.1, p_block = 0.2 }",
            "{ p = 0.1 }",
        ),
        ({"campaign": {"entropy": "xyz"}}, 'campaign.entropy = "xyz"', "entropy = 0x5eed"),
        # the fix fits the value: too many strips is not "at least 2"
        ({"replica": {"strips": 10000}}, "replica.strips = 10000", "at most 4096"),
        ({"replica": {"strips": 1}}, "replica.strips = 1", "from 2 to 4096"),
        # one way of writing the ε range, as in the README
        ({"axes": {"epsilon": [0.5]}}, "axes.epsilon[0] = 0.5", "9.57e-7 <= epsilon <= 0.1"),
        ({"axes": {"epsilon": [1e-9]}}, "axes.epsilon[0] = 1e-9", "9.57e-7 <= epsilon <= 0.1"),
        # a duplicate names both entries; a percentage gets the fraction it meant
        ({"axes": {"widths": [2, 3, 2]}}, "axes.widths[2] = 2", "axes.widths[0] = 2"),
        ({"precision": {"target": 5}}, "precision.target = 5", "for 5 % write 0.05"),
        (
            {"axes": {"couplings": {"start": 0.2, "stop": -0.2, "num": 3}}},
            "axes.couplings.stop = -0.2",
            "greater than start = 0.2; swap them",
        ),
        ({"axes": {"couplings": [11.0]}}, "axes.couplings[0] = 11.0", "-10 <= x <= 10"),
        # a range's size is bounded before its values are made (10^8 once filled the
        # memory of a 24 GiB machine)
        (
            {"axes": {"couplings": {"start": 0.0, "stop": 0.1, "num": 100_000_000}}},
            "axes.couplings.num = 100000000",
            "from 1 to 1_000_000",
        ),
        (
            {"replica": {"initial": 20000}},
            "replica.initial = 20000",
            "from 1 to 10_000",
        ),
        # the goal's fixes name the allowed range and an example
        (
            {"goal": {"nu_halfwidth": 7, "cpu_hours": 10}},
            "goal.nu_halfwidth = 7",
            "0 < nu_halfwidth <= 5, e.g. nu_halfwidth = 0.05",
        ),
        (
            {"goal": {"nu_halfwidth": 0.05, "cpu_hours": "lots"}},
            'goal.cpu_hours = "lots"',
            "cpu_hours > 0, e.g. cpu_hours = 2000",
        ),
        (
            {"goal": {"nu_halfwidth": 0.05}},
            "goal.cpu_hours is missing",
            "add cpu_hours = 2000 under [goal]",
        ),
    ],
)
def test_messages_read_as_toml(overrides, shown, fix, tmp_path):
    proc = cli("plan", write_recipe(tmp_path / "r.toml", overrides))
    assert proc.returncode == 2
    assert shown in proc.stderr and fix in proc.stderr, proc.stderr
    assert "{'" not in proc.stderr and "None" not in proc.stderr


def test_missing_recipe_file(tmp_path):
    proc = cli("run", tmp_path / "nope.toml", "--store", tmp_path / "s")
    assert proc.returncode == 2 and "no such file" in proc.stderr
    assert proc.stderr.count("nope.toml") == 1, proc.stderr  # named once
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "s").exists()


def test_store_in_foreign_directory_refused(tmp_path):
    recipe = write_recipe(tmp_path / "ok.toml")
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "thesis.tex").write_text("precious")
    proc = cli("run", recipe, "--store", foreign)
    assert proc.returncode == 2 and "not a sweepctl store" in proc.stderr
    assert [p.name for p in foreign.iterdir()] == ["thesis.tex"]


def test_second_driver_refused(small_store, tmp_path):
    import json
    import os
    import socket

    store = tmp_path / "store"
    shutil.copytree(small_store, store)
    # this test process is alive: its lock must be respected
    (store / "lock").write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname()}))
    recipe = write_recipe(tmp_path / "ok.toml", {"axes": {"widths": [2], "couplings": [0.0]}})
    proc = cli("run", recipe, "--store", store)
    assert proc.returncode == 2
    assert "in use by the driver" in proc.stderr and "Traceback" not in proc.stderr


def test_plan_names_the_file_for_a_cap_below_the_strip_minimum(tmp_path):
    # one replica of 26 strips (BASE) is fewer than the 51 strip values an error bar
    # needs ([S1] tests/REFERENCES.md); plan has no store, the message still names the file
    path = write_recipe(tmp_path / "capped.toml", {"precision": {"max_layers": 600}})
    proc = cli("plan", path)
    assert proc.returncode == 2, proc.stderr
    line = proc.stderr.strip()
    assert "capped.toml: precision.max_layers = " in line, line
    assert "recipe:" not in line and "1 replicas" not in line, line
    # the number in the fix is valid TOML (underscores, not commas)
    need = re.search(r"allow at least ([0-9_]+) layers", line)
    assert need and "," not in need.group(1), line
