"""``python -m hemostream.cli`` and the ``hemostream`` console script: the commands are
registered in :mod:`hemostream.app.cli` (the composition root)."""

from __future__ import annotations

import sys

from .app.cli import build_parser, main

__all__ = ["build_parser", "main"]

if __name__ == "__main__":
    sys.exit(main())
