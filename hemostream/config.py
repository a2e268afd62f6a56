"""Loading and checking configuration files (TOML) into :class:`hemostream.core.config.Config`."""

from __future__ import annotations

import sys
import tomllib
from pathlib import Path

from pydantic import ValidationError

from .core.config import Config

DEFAULT_CONFIG = Path(__file__).resolve().parent.parent / "configs" / "default.toml"


class ConfigError(ValueError):
    """Every problem found in a configuration file, one per line: file, key, expectation."""

    def __init__(self, path: str, problems: list[str]) -> None:
        self.path = path
        self.problems = problems
        super().__init__("\n".join(f"{path}: {p}" for p in problems))


def _loc(loc: tuple) -> str:
    out = ""
    for item in loc:
        if isinstance(item, int):
            out += f"[{item}]"
        else:
            out += ("." if out else "") + str(item)
    return out or "(top level)"


def config_problems(err: ValidationError) -> list[str]:
    problems = []
    for e in err.errors(include_url=False):
        loc = _loc(e["loc"])
        if e["type"] == "extra_forbidden":
            problems.append(f"{loc}: unknown key (misspelt, or not an option here)")
        elif e["type"] == "missing":
            problems.append(f"{loc}: required key is missing")
        else:
            got = e.get("input")
            shown = f" (got {got!r})" if not isinstance(got, dict | list) else ""
            problems.append(f"{loc}: {e['msg']}{shown}")
    return problems


def parse_config(data: dict, path: str = "<config>") -> Config:
    try:
        return Config.model_validate(data)
    except ValidationError as e:
        raise ConfigError(path, config_problems(e)) from None


def load_for_command(path: str | Path | None, *, shipped_default: bool = False) -> Config:
    """A command's configuration: the named file, else the shipped ``configs/default.toml``
    (``shipped_default``) or the built-in defaults. An invalid file ends the command with
    every problem listed on stderr and exit status 2."""
    try:
        if path is None and shipped_default and DEFAULT_CONFIG.is_file():
            path = DEFAULT_CONFIG
        return load_config(path)
    except ConfigError as e:
        print(f"invalid configuration\n{e}", file=sys.stderr)
        raise SystemExit(2) from None


def with_overrides(cfg: Config, broker: str | None = None, db: str | None = None) -> Config:
    """``cfg`` with the command line's ``--broker`` and ``--db`` in place of the file's."""
    upd = {}
    if broker:
        upd["broker"] = cfg.broker.model_copy(update={"url": broker})
    if db:
        upd["store"] = cfg.store.model_copy(update={"url": db})
    return cfg.model_copy(update=upd) if upd else cfg


def load_config(path: str | Path | None = None) -> Config:
    """Load a TOML configuration; ``None`` gives the built-in defaults."""
    if path is None:
        return Config()
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as e:
        raise ConfigError(str(p), [f"cannot read the file: {e.strerror or e}"]) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(str(p), [f"not valid TOML: {e}"]) from None
    return parse_config(data, str(p))
