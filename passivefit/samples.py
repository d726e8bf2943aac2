"""Where the bundled sample recordings are (simulated; see `passivefit demo`)."""

from __future__ import annotations

import os
from pathlib import Path

DEFAULT_SAMPLE = "LOL-2026-11-03-c1_CA1.nwb"
REPO_SAMPLES = Path(__file__).resolve().parent.parent / "sample_recordings"


def sample_folder() -> Path:
    """The sample folder of a source checkout, else a cache folder written on first use."""
    if (REPO_SAMPLES / DEFAULT_SAMPLE).exists():
        return REPO_SAMPLES
    cache_home = Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache"))
    cache = cache_home / "passivefit" / "samples"
    if not (cache / DEFAULT_SAMPLE).exists():
        from passivefit.commands.demo import write_samples

        write_samples(cache)
    return cache


def bundled_sample() -> Path:
    """The recording the window opens when no path is given."""
    return sample_folder() / DEFAULT_SAMPLE
