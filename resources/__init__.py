"""The fixed files of the window and the report: icon, palette, report texts.

This folder is installed as the package ``passivefit.resources`` (see pyproject.toml);
its files are read through importlib.resources.
"""

from __future__ import annotations

import json
from importlib import resources


def resource_path(name: str):
    """The resource file `name` (e.g. ``"icon.svg"``) as a path-like Traversable."""
    return resources.files(__name__).joinpath(name)


def read_json(name: str) -> dict:
    """The JSON resource file `name`, decoded."""
    return json.loads(resource_path(name).read_text(encoding="utf-8"))
