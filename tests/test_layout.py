"""The package layout holds: imports go one way, app -> live / dashboard / review -> core.

Every module's imports are read with ``ast`` (nothing is imported), so a rule broken by an
import hidden inside a function is found as well as one at the top of a module.

- ``hemostream.core`` imports nothing from the shell (the pure core, docs: DEVELOPERS.md);
- ``hemostream.dashboard`` is a view: no broker (``live``), no database (``store``), no
  ``app``, no ``replay``;
- ``hemostream.live`` (transport and service) imports neither ``dashboard`` nor ``app``;
- only ``hemostream.app`` (and the ``hemostream.cli`` entry point) imports ``hemostream.app``;
- ``simulators`` imports only ``hemostream.core.wire``, ``hemostream.core.units`` and the
  commands' shared number arguments, ``hemostream.core.argtypes``;
- no module imports another module's underscored (private) name;
- the composition root and the shell modules import hemostream modules at module level
  only, so an import cycle cannot hide inside a function; except where a command's start-up
  time is at stake (:data:`ON_FIRST_USE`: the command line's handlers import their command's
  modules when run), and there every such import is made in a fresh interpreter after the
  command line's own, so a cycle would show there.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("hemostream", "simulators")


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def is_package(path: Path) -> bool:
    return path.name == "__init__.py"


def exists(mod: str) -> bool:
    p = ROOT.joinpath(*mod.split("."))
    return p.with_suffix(".py").is_file() or (p / "__init__.py").is_file()


def resolve(path: Path, node: ast.ImportFrom) -> str:
    """The absolute module an ``from ... import`` names."""
    if node.level == 0:
        return node.module or ""
    here = module_name(path).split(".")
    base = here if is_package(path) else here[:-1]
    base = base[:len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def imports(path: Path):
    """(target module, imported name or None, line, inside a function) for every import."""
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    in_function: set[int] = set()
    for fn in ast.walk(tree):
        if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
            for n in ast.walk(fn):
                if isinstance(n, (ast.Import, ast.ImportFrom)):
                    in_function.add(id(n))
    for node in ast.walk(tree):
        inner = id(node) in in_function
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, None, node.lineno, inner
        elif isinstance(node, ast.ImportFrom):
            mod = resolve(path, node)
            for a in node.names:
                sub = f"{mod}.{a.name}"
                if exists(sub):                    # "from .. import query": the module
                    yield sub, None, node.lineno, inner
                else:
                    yield mod, a.name, node.lineno, inner


def sources() -> list[Path]:
    return sorted(p for pkg in PACKAGES for p in (ROOT / pkg).rglob("*.py"))


def under(mod: str, pkg: str) -> bool:
    return mod == pkg or mod.startswith(pkg + ".")


def upward(src: str, target: str) -> str | None:
    """Why importing ``target`` from ``src`` goes against the layout, or None."""
    if not under(target, "hemostream") or target == "hemostream":
        return None            # third-party, stdlib, or the root package (CAUTION, version)
    if under(src, "hemostream.core") and not under(target, "hemostream.core"):
        return "the core imports nothing from the shell"
    if under(src, "hemostream.dashboard"):
        for bad in ("hemostream.live", "hemostream.store", "hemostream.app",
                    "hemostream.replay"):
            if under(target, bad):
                return "the dashboard is a view: no broker, no store, no app"
    if under(src, "hemostream.live"):
        for bad in ("hemostream.dashboard", "hemostream.app"):
            if under(target, bad):
                return "live (transport, service) imports neither dashboard nor app"
    if under(target, "hemostream.app") and not (under(src, "hemostream.app")
                                                or src == "hemostream.cli"):
        return "only the composition root imports hemostream.app"
    if under(src, "simulators") and target not in ("hemostream.core.wire",
                                                   "hemostream.core.units",
                                                   "hemostream.core.argtypes"):
        return "simulators use only hemostream.core.wire, units and argtypes"
    return None


# modules whose hemostream imports must all be at module level
TOP_LEVEL_ONLY = ("hemostream.app", "hemostream.live", "hemostream.dashboard",
                  "hemostream.cli", "hemostream.replay", "hemostream.query",
                  "hemostream.config", "hemostream.pipeline")

#: modules whose functions may import hemostream modules (on first use), and why
ON_FIRST_USE = {
    "hemostream.app.cli": "every command builds the whole parser; each handler loads its own "
                          "command (a query without the live service, rich or the config "
                          "models: docs/performance.md)",
    "hemostream.app.status": "its parser is built for every command; the store on first use",
}


def problems() -> list[str]:
    out = []
    for path in sources():
        src = module_name(path)
        for target, name, line, inner in imports(path):
            where = f"{path.relative_to(ROOT)}:{line}"
            why = upward(src, target)
            if why:
                out.append(f"{where}: {src} imports {target} ({why})")
            if (name and name.startswith("_") and not name.startswith("__")
                    and target != src):
                out.append(f"{where}: {src} imports the private name {name} of {target}")
            if (inner and any(under(src, m) for m in TOP_LEVEL_ONLY)
                    and src not in ON_FIRST_USE and under(target, "hemostream")):
                out.append(f"{where}: {src} imports {target} inside a function")
    return out


def test_imports_follow_the_layout():
    found = problems()
    assert found == [], "\n".join(found)


@pytest.mark.parametrize("src,target,bad", [
    ("hemostream.core.processor", "hemostream.store", True),
    ("hemostream.core.processor", "hemostream.core.wire", False),
    ("hemostream.dashboard.model", "hemostream.live.mqtt", True),
    ("hemostream.dashboard.model", "hemostream.store", True),
    ("hemostream.dashboard.model", "hemostream.core.wire", False),
    ("hemostream.live.service", "hemostream.dashboard", True),
    ("hemostream.live.service", "hemostream.app.demo", True),
    ("hemostream.live.service", "hemostream.store", False),
    ("hemostream.replay", "hemostream.app.cli", True),
    ("hemostream.app.cli", "hemostream.live.service", False),
    ("hemostream.cli", "hemostream.app.cli", False),
    ("simulators.ward", "hemostream.core.wire", False),
    ("simulators.ward", "hemostream.store", True),
])
def test_the_rules_themselves(src, target, bad):
    assert (upward(src, target) is not None) is bad


def test_the_reader_sees_imports_inside_functions_and_private_names(tmp_path):
    pkg = tmp_path / "hemostream" / "dashboard"
    pkg.mkdir(parents=True)
    (tmp_path / "hemostream" / "__init__.py").write_text("")
    (tmp_path / "hemostream" / "live").mkdir()
    (tmp_path / "hemostream" / "live" / "__init__.py").write_text("")
    (tmp_path / "hemostream" / "live" / "mqtt.py").write_text("")
    (pkg / "__init__.py").write_text("")
    (pkg / "view.py").write_text("def f():\n    from ..live import mqtt\n"
                                 "    from ..live.mqtt import _secret\n")
    global ROOT
    old, ROOT = ROOT, tmp_path
    try:
        found = [(t, n, inner) for t, n, _, inner in imports(pkg / "view.py")]
    finally:
        ROOT = old
    assert ("hemostream.live.mqtt", None, True) in found
    assert ("hemostream.live.mqtt", "_secret", True) in found


def test_imports_made_on_first_use_resolve():
    """Every hemostream module the handlers of :data:`ON_FIRST_USE` import inside functions
    (and the names taken from it) imports in a fresh interpreter after the command line."""
    wanted: dict[str, set[str]] = {}
    for src in ON_FIRST_USE:
        path = ROOT.joinpath(*src.split(".")).with_suffix(".py")
        for target, name, _, inner in imports(path):
            if inner and under(target, "hemostream"):
                wanted.setdefault(target, set()).update([name] if name else [])
    assert "hemostream.query" in wanted and "hemostream.live.service" in wanted
    code = ("import importlib, hemostream.cli\n"
            f"for mod, names in {sorted((m, sorted(n)) for m, n in wanted.items())!r}:\n"
            "    m = importlib.import_module(mod)\n"
            "    for n in names:\n"
            "        getattr(m, n)\n")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr[-3000:]
