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

    Gains: 0.01 mV and 0.1 pA per count. `epochs` are (type, first level pA,
    level increment pA, duration in samples) of the DAC 0 epoch table. See
    :func:`abf2_channels_bytes` for the layout.

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
    channels = [(b"IN 0", b"mV", 0.01, voltage_counts),
                (b"IN 1", second_units, second_per_count, current_counts)]
    return abf2_channels_bytes(channels, rate_hz, epochs, waveform_enabled=waveform_enabled,
                               lowpass_hz=lowpass_hz, command_units=command_units,
                               waveform_source=waveform_source)


def abf2_channels_bytes(
    channels: list[tuple[bytes, bytes, float, np.ndarray]],
    rate_hz: float,
    epochs: list[tuple[int, float, float, int]],
    waveform_enabled: bool = True,
    lowpass_hz: tuple[float, ...] | None = None,
    command_units: bytes = b"pA",
    waveform_source: int = 1,
    protocol_path: bytes = b"C:\\protocols\\lol-steps.pro",
    comment: bytes = b"LOL-2026-11-03-c1 bath 32 C",
) -> bytes:
    """A minimal ABF 2 file of any number of input channels and two DACs.

    Built here from the section layout that pyabf's reader uses (pyabf/abf2/*.py,
    byte offsets in its comments), since no ABF 2 sample may be downloaded. Channels
    are stored interleaved, sample by sample, in the order given; both DACs are named
    OUT 0/OUT 1 in `command_units`, holding 0; only DAC 0 has an epoch table.

    Parameters
    ----------
    channels : list of (name, units, units per count, counts)
        One entry per input channel; counts are int16 arrays, shape (sweeps, samples),
        the same shape for all.
    rate_hz : float
        Per-channel sampling rate, in Hz.
    epochs : list of tuple
        (type, first level, level increment, duration in samples) of DAC 0, in
        `command_units`; the table starts after the 1/64 of the sweep at holding.
    waveform_enabled : bool
        Whether DAC 0 plays its waveform.
    lowpass_hz : tuple of float, optional
        `fSignalLowpassFilter` of each channel, in Hz (0 or None: unset).
    command_units : bytes
        Units of the DACs.
    waveform_source : int
        What DAC 0 plays when enabled (`nWaveformSource`): 1 the epoch table, 2 a
        stimulus file (not named: the strings hold no path).
    protocol_path, comment : bytes
        The protocol file path and the file comment.
    """
    n_ch = len(channels)
    sweeps, samples = channels[0][3].shape
    lowpass = lowpass_hz or (0.0,) * n_ch
    names = [b"Clampex", protocol_path]
    for name, unit, _, _ in channels:
        names += [name, unit]
    dac_name = 3 + 2 * n_ch  # string index of OUT 0; its units follow
    names += [b"OUT 0", command_units, comment]
    strings = b"\0\0" + b"\0".join(names)
    # indices 1..; no trailing NUL (pyabf splits after the last double NUL)
    blocks: dict[str, bytearray] = {}

    header = bytearray(512)
    struct.pack_into("<4s4B", header, 0, b"ABF2", 0, 0, 6, 2)
    struct.pack_into("<IIII", header, 8, 512, sweeps, 20261103, 14 * 3_600_000 + 22 * 60_000 + 5250)
    struct.pack_into("<I", header, 60, 1)  # uCreatorNameIndex
    struct.pack_into("<I", header, 72, 2)  # uProtocolPathIndex

    protocol = bytearray(512)
    struct.pack_into("<hf", protocol, 0, 5, 1e6 / rate_hz)  # episodic, sample interval us
    struct.pack_into("<i", protocol, 22, samples * n_ch)  # lNumSamplesPerEpisode
    struct.pack_into("<fxxxxi", protocol, 110, 10.0, 32768)  # fADCRange, lADCResolution
    struct.pack_into("<i", protocol, 132, dac_name + 2)  # lFileCommentIndex
    struct.pack_into("<h", protocol, 142, 0)  # nActiveDACChannel
    blocks["protocol"] = protocol

    adc = bytearray(128 * n_ch)
    for i, (_, _, per_count, _) in enumerate(channels):
        base = 128 * i
        struct.pack_into("<hh", adc, base, i, 0)  # nADCNum, nTelegraphEnable
        struct.pack_into("<hhf", adc, base + 24, i, i, 1.0)  # PtoL map, sampling seq, prog gain
        struct.pack_into("<ffff", adc, base + 40, 10.0 / 32768 / per_count, 0.0, 1.0, 0.0)
        struct.pack_into("<f", adc, base + 56, lowpass[i] or 0.0)  # fSignalLowpassFilter
        struct.pack_into("<ii", adc, base + 74, 3 + 2 * i, 4 + 2 * i)  # name, units indices
    blocks["adc"] = adc

    dac = bytearray(512)
    for i in range(2):
        base = 256 * i
        struct.pack_into("<h", dac, base, i)
        struct.pack_into("<ii", dac, base + 24, dac_name, dac_name + 1)  # name, units
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
        struct.pack_into("<ii", synch, 8 * k, n_ch * samples * k, n_ch * samples)
    blocks["synch"] = synch

    blocks["strings"] = bytearray(strings)
    data = np.empty((sweeps, samples, n_ch), dtype="<i2")
    for i, (_, _, _, counts) in enumerate(channels):
        data[:, :, i] = counts
    blocks["data"] = bytearray(data.tobytes())

    # section map: (map offset, entry size, entry count) per block, in file order
    layout = {
        "protocol": (76, 512, 1),
        "adc": (92, 128, n_ch),
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


def abf1_channels_bytes(
    channels: list[tuple[int, bytes, bytes, float, np.ndarray]],
    rate_hz: float,
    dac_epochs: dict[int, list[tuple[int, float, float, int]]],
    dac_units: tuple[bytes, ...] = (b"pA", b"pA"),
    dac_names: tuple[bytes, ...] = (b"Cmd 0", b"Cmd 1"),
    waveform_enabled: tuple[int, int] = (1, 0),
    active_dac: int = 0,
    lowpass_hz: float = 0.0,
    version: float = 1.83,
) -> bytes:
    """A minimal ABF 1 file of any number of input channels, with DAC epoch tables.

    Written from the fixed byte offsets that pyabf's reader uses (pyabf/abf1/headerV1.py)
    and the holding and low-pass offsets of passivefit/io/abf.py; the header takes 12
    blocks (6144 bytes), so every field pyabf reads is header. Samples are interleaved
    channel by channel; ADC range 10 V at 16 bits, unit gains but the instrument scale
    factor.

    Parameters
    ----------
    channels : list of (ADC slot, name, units, units per count, counts)
        Counts are int16 arrays, shape (sweeps, samples), the same for all channels;
        the slot (0..15) is where the name, units and gains sit in the header.
    rate_hz : float
        Per-channel sampling rate, in Hz.
    dac_epochs : dict
        DAC number (0 or 1) -> rows (type, first level, level increment, duration in
        per-channel samples), at most 10 per DAC; they follow the 1/64 of the sweep at
        holding (0).
    dac_units, dac_names : tuple of bytes
        Units and names of DAC 0 and DAC 1.
    waveform_enabled : tuple of int
        nWaveformEnable of DAC 0 and DAC 1 (the source is the epoch table).
    active_dac : int
        nActiveDACChannel.
    lowpass_hz : float
        fSignalLowpassFilter of every slot, in Hz (0: unset).
    version : float
        fFileVersionNumber.
    """
    n_ch = len(channels)
    sweeps, samples = channels[0][4].shape
    header_blocks = 12
    data = np.empty((sweeps, samples, n_ch), dtype="<i2")
    for i, ch in enumerate(channels):
        data[:, :, i] = ch[4]
    h = bytearray(header_blocks * 512)
    struct.pack_into("<4sfhi", h, 0, b"ABF ", version, 5, data.size)  # episodic
    struct.pack_into("<iii", h, 16, sweeps, 20261103, 14 * 3600 + 22 * 60 + 5)
    struct.pack_into("<f", h, 32, version)  # fHeaderVersionNumber
    struct.pack_into("<h", h, 36, 1)  # nFileType
    struct.pack_into("<i", h, 40, header_blocks)  # lDataSectionPtr
    struct.pack_into("<h", h, 100, 0)  # nDataFormat: int16
    struct.pack_into("<hf", h, 120, n_ch, 1e6 / (rate_hz * n_ch))  # channels, interval (us)
    struct.pack_into("<i", h, 138, samples * n_ch)  # lNumSamplesPerEpisode
    struct.pack_into("<ffii", h, 244, 10.0, 10.0, 32768, 32768)  # ADC/DAC range, resolution
    struct.pack_into("<16s", h, 294, b"Clampex")
    struct.pack_into("<16h", h, 378, *range(16))  # nADCPtoLChannelMap
    seq = [ch[0] for ch in channels] + [-1] * (16 - n_ch)
    struct.pack_into("<16h", h, 410, *seq)  # nADCSamplingSeq
    for slot in range(16):
        struct.pack_into("<f", h, 730 + 4 * slot, 1.0)  # fADCProgrammableGain
        struct.pack_into("<f", h, 922 + 4 * slot, 1.0)  # fInstrumentScaleFactor
        struct.pack_into("<f", h, 1050 + 4 * slot, 1.0)  # fSignalGain
        struct.pack_into("<f", h, 1178 + 4 * slot, lowpass_hz)  # fSignalLowpassFilter
    for slot, name, unit, per_count, _ in channels:
        struct.pack_into("<10s", h, 442 + 10 * slot, name.ljust(10))
        struct.pack_into("<8s", h, 602 + 8 * slot, unit.ljust(8))
        struct.pack_into("<f", h, 922 + 4 * slot, 10.0 / 32768 / per_count)
    for d in range(2):
        struct.pack_into("<10s", h, 1306 + 10 * d, dac_names[d].ljust(10))
        struct.pack_into("<8s", h, 1346 + 8 * d, dac_units[d].ljust(8))
    struct.pack_into("<h", h, 1440, active_dac)
    struct.pack_into("<2h", h, 2296, *waveform_enabled)
    struct.pack_into("<2h", h, 2300, 1, 1)  # nWaveformSource: the epoch table
    for dac, rows in dac_epochs.items():
        for k, (kind, level, increment, duration) in enumerate(rows):
            e = 10 * dac + k
            struct.pack_into("<h", h, 2308 + 2 * e, kind)
            struct.pack_into("<f", h, 2348 + 4 * e, level)
            struct.pack_into("<f", h, 2428 + 4 * e, increment)
            struct.pack_into("<i", h, 2508 + 4 * e, duration)
    struct.pack_into("<256s", h, 4898, b"C:\\protocols\\lol-iv.pro")
    struct.pack_into("<128s", h, 5154, b"LOL-2026-11-03 invented cell")
    return bytes(h) + data.tobytes()
