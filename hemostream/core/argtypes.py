"""Number arguments of the commands (argparse ``type=``), one wording for every command.

argparse names the option in front of the message (``argument --limit: expected a whole
number 0 or more, got '-1'``). Shared by ``hemostream``'s commands and the simulators' (which
use nothing else of hemostream but the wire format and units). No I/O.

>>> whole_number(1, 10000)("12"), number_above(0)("2.5")
(12, 2.5)
>>> whole_number(0)("-1")
Traceback (most recent call last):
argparse.ArgumentTypeError: expected a whole number 0 or more, got '-1'
"""

from __future__ import annotations

import argparse
import math
from typing import Callable

__all__ = ["whole_number", "number_above"]


def whole_number(low: int | None = None, high: int | None = None,
                 what: str = "a whole number") -> Callable[[str], int]:
    """A type accepting whole numbers in [low, high] (either end open when None); ``what``
    names them in the message, e.g. ``"a whole number of patients"``."""
    if low is not None and high is not None:
        accepted = f"{what} from {low} to {high}"
    elif low is not None:
        accepted = f"{what} above 0" if low == 1 else f"{what} {low} or more"
    elif high is not None:
        accepted = f"{what} up to {high}"
    else:
        accepted = what

    def parse(text: str) -> int:
        try:
            n = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {accepted}, got {text!r}") from None
        if (low is not None and n < low) or (high is not None and n > high):
            raise argparse.ArgumentTypeError(f"expected {accepted}, got {text!r}")
        return n
    parse.__name__ = "whole number"          # argparse's word for a value it cannot call
    return parse


def number_above(low: float = 0.0) -> Callable[[str], float]:
    """A type accepting finite numbers above ``low``."""
    def parse(text: str) -> float:
        try:
            x = float(text)
        except ValueError:
            x = math.nan
        if not (x > low and math.isfinite(x)):
            raise argparse.ArgumentTypeError(f"expected a number above {low:g}, got {text!r}")
        return x
    parse.__name__ = "number"
    return parse
