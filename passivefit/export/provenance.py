"""Small helpers shared by sheets, report and database: settings hash, flag text, units.

All of them read the plain ``RecordingResult.to_dict()`` object, never the result classes.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable, Mapping

# Display unit of a key, read from a `_<unit>` token in its name (tau0_ci95_ms → ms).
UNIT_TOKENS = {"mV": "mV", "MOhm": "MΩ", "ms": "ms", "pF": "pF", "pA": "pA", "C": "°C"}


def settings_hash(settings: Mapping) -> str:
    """Stable identity of analysis settings, equal to ``Settings.settings_hash()``.

    Parameters
    ----------
    settings : mapping
        The ``settings`` object of a result (``Settings.to_dict()``, plain JSON types).

    Returns
    -------
    str
        16 hex digits of the sha256 of the key-sorted JSON text; equal settings give
        equal hashes whatever the key order.
    """
    text = json.dumps(settings, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


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


def unit_of(key: str) -> str:
    """Display unit named in a key (``"r_in_MOhm"`` → ``"MΩ"``), or ``""``."""
    for token in reversed(key.split("_")[1:]):
        if token in UNIT_TOKENS:
            return UNIT_TOKENS[token]
    return ""
