"""Loading and checking configuration files (TOML) into :class:`hemostream.core.config.Config`."""

from __future__ import annotations

import sys
import tomllib
from pathlib import Path
from typing import Any, Callable

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
    upd: dict[str, Any] = {}
    if broker:
        upd["broker"] = cfg.broker.model_copy(update={"url": broker})
    if db:
        upd["store"] = cfg.store.model_copy(update={"url": db})
    return cfg.model_copy(update=upd) if upd else cfg


#: database URL schemes the store opens (SQLAlchemy dialects with their drivers installed)
STORE_SCHEMES = ("sqlite", "postgresql")


def _runtime_problems(data: dict, cfg: Config | None) -> list[str]:
    """What ``run`` checks beyond the schema: the database URL's scheme, unit and bed ids
    given twice (the broker's settings are checked by the caller's ``extra``)."""
    out = []
    store = data.get("store")
    url = store.get("url") if isinstance(store, dict) else None
    if isinstance(url, str):
        scheme = url.split(":", 1)[0].split("+", 1)[0].lower() if ":" in url else ""
        if scheme not in STORE_SCHEMES:
            out.append(f"store.url: {url.split('@')[-1]!r} is not a database URL this store "
                       "opens; expected sqlite:///FILE or postgresql+psycopg://HOST/DB")
    units = data.get("units")
    units = units if isinstance(units, list) else []
    seen_units: set = set()
    for i, u in enumerate(units):
        if not isinstance(u, dict):
            continue
        uid = u.get("id")
        if isinstance(uid, str):
            if uid in seen_units:
                out.append(f"units[{i}].id: unit {uid!r} is given twice")
            seen_units.add(uid)
        beds = u.get("beds")
        beds = beds if isinstance(beds, list) else []
        seen: set = set()
        for j, b in enumerate(beds):
            if isinstance(b, str) and b in seen:
                out.append(f"units[{i}].beds[{j}]: bed {b!r} is given twice in unit {uid!r}")
            seen.add(b)
    return out


def check_config_file(path: str | Path,
                      extra: Callable[[dict, Config | None], list[str]] | None = None
                      ) -> list[str]:
    """Every problem of a configuration file at once (``check-config``): the schema's, and
    what ``run`` would refuse (see :func:`_runtime_problems`); [] when it is usable."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except OSError as e:
        return [f"cannot read the file: {e.strerror or e}"]
    except tomllib.TOMLDecodeError as e:
        return [f"not valid TOML: {e}"]
    cfg = None
    try:
        cfg = Config.model_validate(data)
        problems: list[str] = []
    except ValidationError as e:
        problems = config_problems(e)
    keys = {q.split(":", 1)[0] for q in problems}
    more = (extra(data, cfg) if extra is not None else []) + _runtime_problems(data, cfg)
    for q in more:
        if q.split(":", 1)[0] not in keys and q not in problems:
            problems.append(q)
    return problems


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
