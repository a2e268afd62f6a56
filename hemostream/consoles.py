"""A rich console made on first use.

Every command builds the whole command line's parser, so the modules that register
subcommands keep their module-level consoles without importing rich (a tenth of a second)
until something is printed.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from rich.console import Console


class LazyConsole:
    """``Console(**options)``, made when first used; ``.real`` is the console itself (for
    rich's own classes, such as a progress bar's ``console=``)."""

    def __init__(self, **options: Any) -> None:
        self._options = options
        self._console: Console | None = None

    @property
    def real(self) -> Console:
        if self._console is None:
            from rich.console import Console

            self._console = Console(**self._options)
        return self._console

    def __getattr__(self, name: str) -> Any:
        return getattr(self.real, name)
