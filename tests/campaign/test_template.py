"""`sweepctl new`: a commented template recipe that parses, explains every key and has an
entropy of its own."""

from __future__ import annotations

import re
import tomllib

from sweepctl.campaign.recipe import _SECTIONS, load_recipe
from tests.campaign.helpers import cli


def test_new_writes_a_recipe_that_plans(tmp_path):
    path = tmp_path / "my-crossing.toml"
    proc = cli("new", path)
    assert proc.returncode == 0, proc.stderr
    rec = load_recipe(path)
    assert rec.name == "my-crossing"
    assert cli("plan", path, "--json").returncode == 0


def test_each_template_has_its_own_entropy(tmp_path):
    a, b = tmp_path / "a.toml", tmp_path / "b.toml"
    assert cli("new", a).returncode == 0 and cli("new", b).returncode == 0
    ea, eb = load_recipe(a).entropy, load_recipe(b).entropy
    assert ea is not None and eb is not None and ea != eb
    assert ea.bit_length() > 64  # 128 random bits: a collision is not a practical worry


def test_every_recipe_key_is_explained(tmp_path):
    path = tmp_path / "t.toml"
    assert cli("new", path).returncode == 0
    text = path.read_text()
    data = tomllib.loads(text)
    for section, keys in _SECTIONS.items():
        assert f"[{section}]" in text
        for key in keys:
            # set in the file, or named in a comment (the alternatives such as max_cpu_hours)
            assert key in data.get(section, {}) or re.search(rf"#.*\b{key}\b", text), key


def test_new_never_overwrites(tmp_path):
    path = tmp_path / "mine.toml"
    path.write_text("# my own recipe\n")
    proc = cli("new", path)
    assert proc.returncode == 2 and "already exists" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert path.read_text() == "# my own recipe\n"


def test_new_in_a_missing_directory_is_one_line(tmp_path):
    proc = cli("new", tmp_path / "no" / "such" / "dir" / "r.toml")
    assert proc.returncode == 2 and "cannot write" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
