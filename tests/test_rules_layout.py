"""Layout rules of the rules package (DEVELOPERS.md: a pure core
apart from the I/O shell; modules small enough to read).

- (module sizes: tests/test_module_sizes.py checks every module of the package);
- nothing in the rules package imports the shell: ``hemostream.live``, ``dashboard``,
  ``review``, ``store``, ``app`` (nor the CLI or the replay), checked on the source (every
  import statement, also inside functions) and on a fresh interpreter's loaded modules;
- the names existing callers import still resolve, and the engine satisfies the protocol.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
CORE = ROOT / "hemostream" / "core"
PKG = CORE / "rules"
SHELL = ("hemostream.live", "hemostream.dashboard", "hemostream.review", "hemostream.store",
         "hemostream.app", "hemostream.cli", "hemostream.replay", "hemostream.query",
         "hemostream.config")

MODULES = sorted(PKG.glob("*.py")) + [CORE / "alarms.py", CORE / "trends.py"]


def test_the_package_exists_and_the_old_modules_are_gone():
    assert (PKG / "__init__.py").is_file()
    for old in ("rules.py", "rules_config.py", "rules_artifacts.py"):
        assert not (CORE / old).exists(), old


def _absolute_imports(path: Path) -> list[str]:
    """Every module an import statement of ``path`` names, made absolute."""
    pkg = "hemostream.core.rules" if path.parent == PKG else "hemostream.core"
    out = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[:len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            out.append(mod)
            out += [f"{mod}.{a.name}" for a in node.names]
    return out


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_no_shell_imports_in_the_source(path):
    bad = [m for m in _absolute_imports(path)
           if any(m == s or m.startswith(s + ".") for s in SHELL)]
    assert bad == [], f"{path.name} imports the shell: {bad}"


def test_no_shell_module_is_loaded_with_the_engine():
    code = ("import sys, hemostream.core.rules.engine, hemostream.core.rules.config; "
            "print('\\n'.join(sorted(sys.modules)))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                       cwd=ROOT, timeout=60)
    assert r.returncode == 0, r.stderr
    loaded = r.stdout.split()
    bad = [m for m in loaded if any(m == s or m.startswith(s + ".") for s in SHELL)]
    assert bad == []


def test_existing_import_paths_and_the_protocol():
    from hemostream.core.rules import CommandError, RuleEvent, RulesEngine, RulesLayer
    from hemostream.core.rules.config import AlarmConfig, LimitRule, RulesConfig
    from hemostream.core import alarms

    assert RuleEvent is alarms.RuleEvent and CommandError is alarms.CommandError
    assert AlarmConfig is alarms.AlarmConfig
    assert isinstance(RulesEngine(), RulesLayer)
    assert RulesConfig().limits["HR"].__class__ is LimitRule
