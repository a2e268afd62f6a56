"""Modules small enough to read (DEVELOPERS.md; issue 16): no module of ``hemostream`` or
``simulators`` over 400 lines unless one of its first 15 lines gives the reason, as a line
starting ``Size:``. Whoever grows a module past the limit splits it or writes why it stays
whole."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
MAX_LINES = 400
MODULES = sorted(p for pkg in ("hemostream", "simulators") for p in (ROOT / pkg).rglob("*.py"))


def test_every_package_module_is_looked_at():
    names = {p.relative_to(ROOT).as_posix() for p in MODULES}
    assert {"hemostream/core/processor.py", "hemostream/app/cli.py", "simulators/model.py",
            "hemostream/core/rules/engine.py", "hemostream/intake/hl7/mllp.py"} <= names


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.relative_to(ROOT).as_posix())
def test_module_size(path):
    lines = path.read_text(encoding="utf-8").splitlines()
    if len(lines) <= MAX_LINES:
        return
    head = [x.strip() for x in lines[:15]]
    reasons = [x for x in head if x.startswith("Size:")]
    assert reasons and len(reasons[0]) > len("Size: ") + 10, (
        f"{path.relative_to(ROOT)} has {len(lines)} lines (> {MAX_LINES}); split it or say "
        "why at its top (a line starting 'Size:' with the reason)")
