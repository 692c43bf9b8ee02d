"""Every citation in code and tests resolves to an entry of the project's own references
file, and nothing cites a file the repository does not carry."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
REFS = ROOT / "tests" / "REFERENCES.md"
CITATION = re.compile(r"\[([A-Z][0-9]+)\]")


def _sources():
    for base in ("sweepctl", "tests"):
        for path in sorted((ROOT / base).rglob("*")):
            if path.suffix in {".py", ".md", ".toml"} and path != REFS and path.is_file():
                yield path
    for name in ("README.md", "DEVELOPERS.md"):
        yield ROOT / name


def _entries() -> set[str]:
    return set(re.findall(r"^\*\*\[([A-Z][0-9]+)\]", REFS.read_text(), flags=re.MULTILINE))


def test_the_references_file_has_entries():
    assert {"K8", "M2", "P1", "S1", "S2"} <= _entries()


def test_every_citation_resolves():
    entries = _entries()
    missing = {
        (path.relative_to(ROOT).as_posix(), cid)
        for path in _sources()
        for cid in CITATION.findall(path.read_text(encoding="utf-8"))
        if cid not in entries
    }
    assert not missing, sorted(missing)


def test_only_files_inside_the_repository_are_cited():
    bad = []
    for path in _sources():
        for m in re.finditer(r"([\w./-]*REFERENCES\.md)", path.read_text(encoding="utf-8")):
            cited = m.group(1)
            if (
                cited not in {"REFERENCES.md", "tests/REFERENCES.md"}
                and not (ROOT / cited).exists()
            ):
                bad.append((path.relative_to(ROOT).as_posix(), cited))
            if cited == "REFERENCES.md" and path.parent != REFS.parent:
                bad.append((path.relative_to(ROOT).as_posix(), cited))
    assert not bad, bad


def test_every_numpydoc_reference_names_its_entry():
    # a ".. [n] ..." item in a docstring must say which entry of the references file it is
    bad = []
    item = re.compile(r"^\s*\.\. \[\d+\](.*(?:\n(?!\s*\.\. \[|\s*$|\s*\"\"\").*)*)", re.M)
    for path in _sources():
        if path.suffix != ".py":
            continue
        for m in item.finditer(path.read_text(encoding="utf-8")):
            if not CITATION.search(m.group(1)):
                bad.append((path.relative_to(ROOT).as_posix(), m.group(0).strip()[:60]))
    assert not bad, bad
