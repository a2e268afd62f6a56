"""``[intake.hl7]``: the settings of the HL7 v2 (IHE PCD-01) intake.

The model is :mod:`hemostream.core.intake`'s (a section of the one configuration); this module
re-exports it and loads it from a file.
"""

from __future__ import annotations

from pathlib import Path

from ...config import load_config as _load
from ...core.config import Config
from ...core.intake import (DEFAULT_STATUS_MAP, Hl7Config, Location,  # noqa: F401  (re-exported)
                            location_key, split_host_port)


def load_config(path: str | Path | None) -> tuple[Config, Hl7Config]:
    """(Config, its ``[intake.hl7]`` settings) from a TOML file (None: the defaults)."""
    cfg = Config() if path is None else _load(path)
    return cfg, cfg.intake.hl7
