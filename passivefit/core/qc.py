"""Quality flags: a code of our own, a plain-words message and the value behind it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Flag:
    """One quality observation about a sweep or a cell.

    Parameters
    ----------
    code : str
        Stable identifier, ``<where>.<what>`` (see passivefit.model.schema.FLAGS).
    message : str
        What was seen and what it means, in plain words.
    value : float or None
        The number that triggered the flag (units given in the message).
    """

    code: str
    message: str
    value: float | None = None

    def to_dict(self) -> dict:
        value = None if self.value is None or not np.isfinite(self.value) else float(self.value)
        return {"code": self.code, "message": self.message, "value": value}


def runs_test_z(residuals: np.ndarray) -> float:
    """Wald–Wolfowitz runs test on the signs of the residuals, as a z score.

    Strongly negative z means too few sign changes: structure left in the residuals.
    """
    signs = np.asarray(residuals) > 0
    n_pos = int(signs.sum())
    n_neg = signs.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return float("-inf")
    runs = 1 + int(np.count_nonzero(signs[1:] != signs[:-1]))
    n = n_pos + n_neg
    mean = 2.0 * n_pos * n_neg / n + 1.0
    var = (mean - 1.0) * (mean - 2.0) / (n - 1.0)
    return float((runs - mean) / np.sqrt(var)) if var > 0 else 0.0


def percentile_halfwidth(samples: np.ndarray) -> float | None:
    """95 % CI half-width from bootstrap samples (None with fewer than 10).

    Half the central 95 % range with 40 or more samples; 1.96 sd with fewer, where the
    extreme percentiles are too rough.
    """
    samples = samples[np.isfinite(samples)]
    if samples.size < 10:
        return None
    if samples.size < 40:
        return float(1.96 * np.std(samples, ddof=1))
    lo, hi = np.percentile(samples, [2.5, 97.5])
    return float((hi - lo) / 2)
