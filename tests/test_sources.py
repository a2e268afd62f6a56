"""Every source the code, configuration and tests cite is listed in docs/sources.md, and
nothing points to a file outside the repository."""

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
SOURCES = (ROOT / "docs" / "sources.md").read_text(encoding="utf-8")
#: where citations live: code, simulators, tests, benchmarks, configuration
SCANNED = ("hemostream", "simulators", "tests", "benchmarks", "configs")
SUFFIXES = {".py", ".toml", ".md"}

#: a source key: lowercase name ending in a year, in square brackets: [mosteller1987]
KEY = re.compile(r"\[([a-z][a-z0-9-]*\d{4}[a-z]?)\]")
#: a journal citation: year;volume:page, e.g. 1987;317:1098 or 1998;274:H500
JOURNAL = re.compile(r"\b((?:1[89]|20)\d{2});(\d+):(H?\d+)")
#: named references that are cited by name rather than by journal
NAMED = ("The ICU Book", "ATLS", "IEC 60601-1-8", "UCUM", "MQTT 5.0", "MQTT 3.1.1",
         "RFC 3339", "IEEE 11073", "HL7", "pint", "Guyton and Hall")


def _files():
    for top in SCANNED:
        for p in sorted((ROOT / top).rglob("*")):
            if p.suffix in SUFFIXES and p.is_file() and "__pycache__" not in p.parts:
                yield p


def _cited(pattern: re.Pattern) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for p in _files():
        for m in pattern.finditer(p.read_text(encoding="utf-8", errors="replace")):
            out.setdefault(m.group(0), []).append(str(p.relative_to(ROOT)))
    return out


DEFINED = set(re.findall(r"^- \*\*\[([^\]]+)\]\*\*", SOURCES, re.M))


def test_sources_file_defines_keys():
    assert len(DEFINED) >= 20
    assert {"mosteller1987", "dubois1916", "allgower1967", "pint"} <= DEFINED


def test_every_cited_key_has_an_entry():
    cited = {KEY.fullmatch(k).group(1): where for k, where in _cited(KEY).items()}
    missing = {k: w[:3] for k, w in cited.items() if k not in DEFINED}
    assert not missing, f"cited but not in docs/sources.md: {missing}"
    assert cited, "the tests cite sources by key"


def test_every_journal_citation_has_an_entry():
    cited = _cited(JOURNAL)
    missing = {c: w[:3] for c, w in cited.items() if c not in SOURCES}
    assert not missing, f"journal citations not in docs/sources.md: {missing}"
    assert len(cited) >= 10


@pytest.mark.parametrize("name", NAMED)
def test_named_references_have_an_entry(name):
    used = any(name in p.read_text(encoding="utf-8", errors="replace") for p in _files()
               if p.name != "test_sources.py")
    if used:
        assert name in SOURCES, f"{name} is cited but has no entry in docs/sources.md"


def test_nothing_points_outside_the_repository():
    bad = []
    pat = re.compile(r"references\.md|\bshared/|/work/shared")
    for p in [*_files(), *(ROOT / "docs").glob("*.md"), ROOT / "README.md",
              ROOT / "DEVELOPERS.md"]:
        if p.name == "test_sources.py":
            continue
        for i, line in enumerate(p.read_text(encoding="utf-8", errors="replace").splitlines()):
            if pat.search(line):
                bad.append(f"{p.relative_to(ROOT)}:{i + 1}: {line.strip()[:80]}")
    assert not bad, "point to docs/sources.md instead:\n" + "\n".join(bad)
