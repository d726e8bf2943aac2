"""Domain errors: what went wrong with the user's input, in one line.

The command line turns every `InputError` (and `LoadError`, `StoreError`) into exit
status 2 and one line on stderr; the window shows the same line in words.
"""

from __future__ import annotations

from pathlib import Path


class InputError(ValueError):
    """Options, paths or sheets that cannot be used as given; the message says the fix."""


class LoadError(ValueError):
    """A recording could not be read; carries the path and the reason."""

    def __init__(self, path: str | Path, reason: str) -> None:
        self.path = str(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")
