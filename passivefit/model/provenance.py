"""Small helpers shared by sheets, report and database: settings hash, flag text, units.

All of them read the plain ``RecordingResult.to_dict()`` object, never the result classes.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

from passivefit.model.schema import unit_of
from passivefit.model.settings import settings_hash


def result_settings_hash(result: Mapping) -> str:
    """The settings hash a result was made with (its own field when present)."""
    return str(result.get("settings_hash") or settings_hash(result["settings"]))


def flags_text(flags: Iterable) -> str:
    """Flags as one line of text: ``"CODE: message; CODE2: message"``.

    Accepts flag objects (``{"code", "message", ...}``) or bare code strings.
    """
    parts = []
    for flag in flags or ():
        if isinstance(flag, Mapping):
            message = flag.get("message")
            parts.append(f"{flag['code']}: {message}" if message else str(flag["code"]))
        else:
            parts.append(str(flag))
    return "; ".join(parts)


__all__ = ["flags_text", "result_settings_hash", "settings_hash", "unit_of"]
