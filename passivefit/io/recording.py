"""The recording data model (`passivefit.model.recording`) as the readers see it, and
helpers the readers and writers share: the file hash and the stored filter corner."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from passivefit.model.errors import LoadError
from passivefit.model.recording import Recording, StepSpec, Sweep

__all__ = ["LoadError", "Recording", "StepSpec", "Sweep", "file_sha256", "metadata_filter_hz"]


def metadata_filter_hz(metadata: dict) -> float | None:
    """The amplifier low-pass corner a writer should store, from `metadata["filter_hz"]`.

    Parameters
    ----------
    metadata : dict
        A recording's metadata; `filter_hz` is the −3 dB corner, in Hz.

    Returns
    -------
    float or None
        The corner in Hz; None when `filter_hz` is absent or None (no filter known).

    Raises
    ------
    ValueError
        `filter_hz` is present but not a positive finite number.
    """
    value = metadata.get("filter_hz")
    if value is None:
        return None
    try:
        hz = float(value)
    except (TypeError, ValueError):
        hz = float("nan")
    if not (np.isfinite(hz) and hz > 0):
        raise ValueError(
            f"metadata `filter_hz` is {value!r}; give the low-pass corner in Hz, or leave it out"
        )
    return hz


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
