"""The fixed files of the top-level ``resources/`` folder: window icon, palette, report texts.

Installed (wheel or editable) the folder is the package ``passivefit.resources`` and is
read with importlib.resources; run from a source tree without installing, the folder
next to the package is read directly.
"""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path


def resource_path(name: str):
    """The resource file `name` (e.g. ``"icon.svg"``) as a path-like Traversable."""
    try:
        folder = resources.files("passivefit.resources")
    except ModuleNotFoundError:  # source tree on PYTHONPATH, not installed
        folder = Path(__file__).resolve().parent.parent / "resources"
    return folder.joinpath(name)


def read_json(name: str) -> dict:
    """The JSON resource file `name`, decoded."""
    return json.loads(resource_path(name).read_text(encoding="utf-8"))
