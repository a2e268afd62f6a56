"""configs/default.toml shows every configuration key with its built-in default, and the
built-in defaults come from the one parameter table (hemostream.core.params)."""

import re
import tomllib
import warnings
from pathlib import Path

import pytest
from pydantic import BaseModel

from hemostream.core.config import (DEFAULT_MAX_AGE, DEFAULT_PLAUSIBLE, Config,
                                    ConfigDeprecation)
from hemostream.core.params import PARAMS, channel_params

ROOT = Path(__file__).resolve().parent.parent
TEXT = (ROOT / "configs" / "default.toml").read_text()
DATA = tomllib.loads(TEXT)


def _plain(v):
    if isinstance(v, BaseModel):
        return {k: _plain(x) for k, x in v}
    if isinstance(v, dict):
        return {k: _plain(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_plain(x) for x in v]
    return v


def _fields(model: BaseModel, prefix=""):
    """(dotted key, default value) of every leaf field; dicts of parameters are leaves."""
    for name in type(model).model_fields:
        v = getattr(model, name)
        key = f"{prefix}{name}"
        if isinstance(v, BaseModel):
            yield from _fields(v, key + ".")
        else:
            yield key, _plain(v)


SECTIONS = [n for n in Config.model_fields if n not in ("rules",)]


@pytest.mark.parametrize("key,default", [kv for kv in _fields(Config())
                                         if kv[0].split(".")[0] in SECTIONS],
                         ids=lambda x: x if isinstance(x, str) else "")
def test_every_key_is_shown_with_its_default(key, default):
    node = DATA
    *path, leaf = key.split(".")
    for part in path:
        node = node.get(part, {})
    if leaf in node:
        assert _plain(node[leaf]) == default, key
    else:
        # keys without a value (None, or an empty list) are shown commented out
        assert default in (None, []), f"{key} missing from configs/default.toml"
        shown = rf"^#\s*{re.escape(leaf)}\s*=" if default is None else rf"^#\s*\[\[{leaf}\]\]"
        assert re.search(shown, TEXT, re.M), f"{key}: not shown (commented) in default.toml"


def test_no_key_in_default_toml_that_the_models_do_not_know():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Config.model_validate(DATA)          # extra keys are errors; no deprecated keys


def test_rules_table_lives_in_rules_toml():
    assert "rules" not in DATA and "configs/rules.toml" in TEXT


def test_defaults_come_from_the_parameter_table():
    assert set(DEFAULT_PLAUSIBLE) == set(DEFAULT_MAX_AGE) == set(PARAMS)
    for p, spec in PARAMS.items():
        assert DEFAULT_PLAUSIBLE[p] == spec.plausible and DEFAULT_MAX_AGE[p] == spec.max_age_s
        lo, hi = spec.plausible
        assert lo < hi and spec.max_age_s > 0


def test_parameter_channels_match_the_artifact_channels():
    # the artifact handling's default channels start with their measured parameters
    chans = Config().rules.artifacts.channels
    for ch, ps in channel_params().items():
        assert [p for p in chans[ch] if p in PARAMS] == ps, ch


def test_sqlite_synchronous_moved_to_store_with_a_warning():
    with pytest.warns(ConfigDeprecation, match=r"store\.sqlite_synchronous"):
        cfg = Config.model_validate({"broker": {"sqlite_synchronous": "normal"}})
    assert cfg.store.sqlite_synchronous == "normal"
    assert "sqlite_synchronous" not in type(cfg.broker).model_fields
    # the new place wins when both are given
    with pytest.warns(ConfigDeprecation, match="ignored"):
        cfg = Config.model_validate({"broker": {"sqlite_synchronous": "normal"},
                                     "store": {"sqlite_synchronous": "full"}})
    assert cfg.store.sqlite_synchronous == "full"
