"""Small synthetic recordings for the reader/writer tests (no simulator needed)."""

from __future__ import annotations

import struct

import numpy as np

from passivefit.io import Recording, Sweep

CELL_ID = "LOL-2026-11-03-c1"  # invented scenario (helper_rules.md)
LAB = "Lindqvist-Okafor Lab of Dendritic Physiology"
DATE = "2026-11-03T14:22:05.250"
PROTOCOL = "hyperpolarizing steps -40 pA, -20 pA increments"
FILTER_HZ = 5000.0


def charging_recording(
    n_sweeps: int = 3,
    n_samples: int = 4000,
    rate_hz: float = 20_000.0,
    with_current: bool = True,
    seed: int = 0,
) -> Recording:
    """Sweeps of a single-exponential charge to a hyperpolarizing step, with noise.

    Step from 10 % of the sweep for half the sweep; -40 pA, -60 pA, ...; R_in 150 MOhm, tau 15 ms,
    rest -68 mV, 0.1 mV noise. Values are not used for fitting, only round trips.
    """
    rng = np.random.default_rng(seed)
    t = np.arange(n_samples) / rate_hz
    length_s = n_samples / rate_hz
    onset, duration = 0.1 * length_s, 0.5 * length_s
    on = (t >= onset) & (t < onset + duration)
    sweeps = []
    for k in range(n_sweeps):
        amp = -40e-12 - 20e-12 * k
        current = np.where(on, amp, 0.0)
        rise = 1.0 - np.exp(-np.clip(t - onset, 0.0, None) / 0.015)
        fall = np.exp(-np.clip(t - onset - duration, 0.0, None) / 0.015)
        response = np.where(t < onset, 0.0, np.where(on, rise, rise[on][-1] * fall))
        voltage = -0.068 + 150e6 * amp * response + rng.normal(0.0, 1e-4, n_samples)
        sweeps.append(Sweep(k, voltage, current if with_current else None))
    metadata = {
        "cell_id": CELL_ID,
        "date": DATE,
        "temperature_C": 32.0,
        "lab": LAB,
        "protocol": PROTOCOL,
        "filter_hz": FILTER_HZ,
    }
    return Recording(sweeps, rate_hz, metadata=metadata)


def abf2_bytes(
    voltage_counts: np.ndarray,
    current_counts: np.ndarray,
    rate_hz: float,
    epochs: list[tuple[int, float, float, int]],
    waveform_enabled: bool = True,
    lowpass_hz: tuple[float, float] = (0.0, 0.0),
    second_units: bytes = b"pA",
    command_units: bytes = b"pA",
    second_per_count: float = 0.1,
    waveform_source: int = 1,
) -> bytes:
    """A minimal two-channel ABF 2 file (IN 0 in mV, IN 1 in pA, OUT 0 in pA).

    Built here from the section layout that pyabf's reader uses (pyabf/abf2/*.py,
    byte offsets in its comments), since no ABF 2 sample may be downloaded.
    Gains: 0.01 mV and 0.1 pA per count. `epochs` are (type, first level pA,
    level increment pA, duration in samples) of the DAC 0 epoch table.

    Parameters
    ----------
    voltage_counts, current_counts : ndarray of int16, shape (sweeps, samples)
    rate_hz : float
    epochs : list of tuple
    waveform_enabled : bool
        Whether DAC 0 plays its epoch table.
    lowpass_hz : tuple of float
        `fSignalLowpassFilter` of IN 0 and IN 1, in Hz (0: unset).
    second_units, command_units : bytes
        Units of IN 1 and of the DACs (both pA by default).
    second_per_count : float
        Gain of IN 1, in its units per count.
    waveform_source : int
        What the DACs play when enabled (`nWaveformSource`): 1 the epoch table, 2 a
        stimulus file (not named: the strings hold no path).
    """
    sweeps, samples = voltage_counts.shape
    strings = b"\0\0" + b"\0".join(
        [
            b"Clampex",
            b"C:\\protocols\\lol-steps.pro",
            b"IN 0",
            b"mV",
            b"IN 1",
            second_units,
            b"OUT 0",
            command_units,
            b"LOL-2026-11-03-c1 bath 32 C",
        ]
    )  # indices 1..9; no trailing NUL (pyabf splits after the last double NUL)
    blocks: dict[str, bytearray] = {}

    header = bytearray(512)
    struct.pack_into("<4s4B", header, 0, b"ABF2", 0, 0, 6, 2)
    struct.pack_into("<IIII", header, 8, 512, sweeps, 20261103, 14 * 3_600_000 + 22 * 60_000 + 5250)
    struct.pack_into("<I", header, 60, 1)  # uCreatorNameIndex
    struct.pack_into("<I", header, 72, 2)  # uProtocolPathIndex

    protocol = bytearray(512)
    struct.pack_into("<hf", protocol, 0, 5, 1e6 / rate_hz)  # episodic, sample interval us
    struct.pack_into("<i", protocol, 22, samples)
    struct.pack_into("<fxxxxi", protocol, 110, 10.0, 32768)  # fADCRange, lADCResolution
    struct.pack_into("<i", protocol, 132, 9)  # lFileCommentIndex
    struct.pack_into("<h", protocol, 142, 0)  # nActiveDACChannel
    blocks["protocol"] = protocol

    adc = bytearray(256)
    for i, (per_count, name, unit) in enumerate([(0.01, 3, 4), (second_per_count, 5, 6)]):
        base = 128 * i
        struct.pack_into("<hh", adc, base, i, 0)  # nADCNum, nTelegraphEnable
        struct.pack_into("<hhf", adc, base + 24, i, i, 1.0)  # PtoL map, sampling seq, prog gain
        struct.pack_into("<ffff", adc, base + 40, 10.0 / 32768 / per_count, 0.0, 1.0, 0.0)
        struct.pack_into("<f", adc, base + 56, lowpass_hz[i])  # fSignalLowpassFilter
        struct.pack_into("<ii", adc, base + 74, name, unit)
    blocks["adc"] = adc

    dac = bytearray(512)
    for i in range(2):
        base = 256 * i
        struct.pack_into("<h", dac, base, i)
        struct.pack_into("<ii", dac, base + 24, 7, 8)  # name, units indices
        struct.pack_into("<hhh", dac, base + 40, int(waveform_enabled and i == 0),
                         waveform_source, 0)
    blocks["dac"] = dac

    epoch_digital = bytearray(4 * len(epochs))
    for k in range(len(epochs)):
        struct.pack_into("<hh", epoch_digital, 4 * k, k, 0)
    blocks["epoch"] = epoch_digital

    per_dac = bytearray(48 * len(epochs))
    for k, (kind, level, increment, duration) in enumerate(epochs):
        struct.pack_into("<hhhffii", per_dac, 48 * k, k, 0, kind, level, increment, duration, 0)
    blocks["per_dac"] = per_dac

    synch = bytearray(8 * sweeps)  # per sweep: first sample, length (all channels)
    for k in range(sweeps):
        struct.pack_into("<ii", synch, 8 * k, 2 * samples * k, 2 * samples)
    blocks["synch"] = synch

    blocks["strings"] = bytearray(strings)
    data = np.empty((sweeps, samples, 2), dtype="<i2")
    data[:, :, 0], data[:, :, 1] = voltage_counts, current_counts
    blocks["data"] = bytearray(data.tobytes())

    # section map: (map offset, entry size, entry count) per block, in file order
    layout = {
        "protocol": (76, 512, 1),
        "adc": (92, 128, 2),
        "dac": (108, 256, 2),
        "epoch": (124, 4, len(epochs)),
        "per_dac": (156, 48, len(epochs)),
        "synch": (316, 8, sweeps),
        "strings": (220, len(strings), 1),
        "data": (236, 2, data.size),
    }
    out = header
    for name, (offset, size, count) in layout.items():
        struct.pack_into("<IIi", out, offset, len(out) // 512, size, count)
        out += blocks[name] + bytes(-len(blocks[name]) % 512)
    return bytes(out)
