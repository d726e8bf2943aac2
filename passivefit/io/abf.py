"""ABF 1 and ABF 2 files, read through pyabf; ABF 1 written through pyabf's writer.

Reading picks the voltage channel (units mV) and the injected current from, in this
order: the command waveform of an enabled ABF 2 epoch table, a recorded current
channel (pA or nA), or nothing (the user then gives the step).

pyabf is imported only when an ABF file is opened.
"""

from __future__ import annotations

import datetime as dt
import struct
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from passivefit.io._rate import whole_hz
from passivefit.io.recording import LoadError, Recording, Sweep, metadata_filter_hz

_SIGNATURES = (b"ABF ", b"ABF2")
_VOLTAGE_UNITS = {"mV": 1e-3}
_CURRENT_UNITS = {"pA": 1e-12, "nA": 1e-9}
_MAX_CHANNELS = 16  # the ABF format has 16 ADC slots

# ABF 1 header layout (byte offsets) used below. pyabf reads every field at a fixed
# offset, even when the file's data section starts earlier, in which case the "field"
# is sample data. Old ABF 1 files and pyabf's own writer have a 2048-byte header.
_ABF1_TELEGRAPH_END = 4640  # nTelegraphEnable (4512) .. fTelegraphAdditGain (4576, 16 f)
_ABF1_COMMENT_NEW_END = 5282  # sProtocolPath (4898, 256 s), sFileCommentNew (5154, 128 s)
_ABF1_FULL_HEADER_BLOCKS = 12  # 6144 bytes: every field pyabf reads is header
_BLOCK = 512
_ABF1_DATA_PTR = 40  # lDataSectionPtr, int32
_ABF1_START_DATE = 20  # lFileStartDate, int32 YYYYMMDD
_ABF1_START_TIME = 24  # lFileStartTime, int32 seconds since midnight
_ABF1_CREATOR = 294  # sCreatorInfo, 16 s
_ABF1_COMMENT_OLD = 310  # sFileCommentOld, 56 s
_ABF1_START_MS = 366  # nFileStartMillisecs, int16
# fSignalLowpassFilter, 16 f (one per ADC), between fSignalOffset (1114, 16 f) and
# sDACChannelName (1306), where fSignalHighpassFilter (16 f) ends the gap: from memory,
# consistent with pyabf's offsets of those neighbours. pyabf itself does not read it.
_ABF1_LOWPASS = 1178
_ABF1_LOWPASS_END = 1242
# A low-pass setting is an amplifier corner only within this range and below the
# Nyquist frequency; headers hold 0 when unset and 100 kHz or more for "bypass"
# (common practice, no source).
_CORNER_RANGE_HZ = (10.0, 1e6)


def _supported_text() -> str:
    from passivefit.io import supported_extensions

    return "passivefit reads " + ", ".join(supported_extensions())


def _reason(err: BaseException) -> str:
    """One line naming the exception type (with its module unless built in) and text."""
    kind = type(err)
    name = kind.__name__ if kind.__module__ == "builtins" else f"{kind.__module__}.{kind.__name__}"
    text = str(err).strip()
    return f"{name}: {text.splitlines()[0]}" if text else name


def _open(path: Path) -> Any:
    """Open the header with pyabf; every pyabf failure becomes a LoadError."""
    with open(path, "rb") as f:
        signature = f.read(4)
    if signature not in _SIGNATURES:
        raise LoadError(path, f"not an ABF file (bad signature {signature!r}); {_supported_text()}")
    import pyabf

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return pyabf.ABF(str(path), loadData=False)
    except Exception as err:  # pyabf raises many unrelated types for damaged files
        raise LoadError(
            path, f"damaged or unsupported ABF file ({_reason(err)}); re-export it from the rig"
        ) from None


def _major(abf: Any) -> int:
    return int(abf.abfVersion["major"])


def _abf1_data_start(abf: Any) -> int:
    return int(abf._headerV1.lDataSectionPtr) * _BLOCK


def _undo_phantom_telegraph_gain(abf: Any) -> None:
    """Drop a telegraph gain pyabf read out of sample data (short ABF 1 headers)."""
    header = abf._headerV1
    if _abf1_data_start(abf) >= _ABF1_TELEGRAPH_END:
        return
    for i, channel in enumerate(abf.channelList):
        adc = header.nADCSamplingSeq[channel]
        if header.nTelegraphEnable[adc] == 1:
            abf._dataGain[i] *= header.fTelegraphAdditGain[adc]


def _check_layout(path: Path, abf: Any) -> None:
    """Reject headers whose sizes cannot be true before any data is read."""
    channels = int(abf.channelCount)
    if not 1 <= channels <= _MAX_CHANNELS:
        raise LoadError(path, f"damaged ABF header: it names {channels} channels")
    if abf.sweepPointCount < 1 or abf.dataPointCount < 1:
        raise LoadError(path, "the ABF file holds no samples; check the recording")
    needed = abf.dataByteStart + abf.dataPointCount * abf.dataPointByteSize
    size = path.stat().st_size
    if needed > size:
        raise LoadError(
            path,
            f"truncated ABF file: the header promises {needed} bytes, the file has {size}; "
            f"copy it again from the rig",
        )


def _sample_rate(path: Path, abf: Any) -> float:
    """Per-channel rate from the header's sample interval (pyabf's dataRate is truncated)."""
    if _major(abf) == 1:
        interval_us = abf._headerV1.fADCSampleInterval * abf.channelCount
    else:
        interval_us = abf._protocolSection.fADCSequenceInterval
    if not (np.isfinite(interval_us) and interval_us > 0):
        raise LoadError(path, f"damaged ABF header: sample interval {interval_us!r} us")
    return whole_hz(1e6 / interval_us)


def _channel(abf: Any, units: dict[str, float]) -> int | None:
    return next((ch for ch in abf.channelList if abf.adcUnits[ch].strip() in units), None)


def _channel_list(abf: Any) -> str:
    return ", ".join(
        f"{name} [{unit}]" for name, unit in zip(abf.adcNames, abf.adcUnits, strict=False)
    )


def _epoch_command_enabled(abf: Any, channel: int) -> bool:
    """Whether pyabf's sweepC for `channel` comes from an enabled ABF 2 epoch table.

    ABF 1 epoch tables are not used: pyabf takes their holding level from the first
    epoch's level, so the step would vanish from the command.
    """
    if _major(abf) != 2:
        return False
    dac = abf._dacSection
    if channel >= len(dac.nWaveformEnable) or channel >= len(abf.dacUnits):
        return False
    return (
        bool(dac.nWaveformEnable[channel])
        and dac.nWaveformSource[channel] == 1
        and abf.dacUnits[channel].strip() in _CURRENT_UNITS
    )


def _read_sweeps(abf: Any, v_channel: int) -> tuple[list[Sweep], str]:
    """All sweeps (V, A) and a note saying where the current came from."""
    v_scale = _VOLTAGE_UNITS[abf.adcUnits[v_channel].strip()]
    use_command = _epoch_command_enabled(abf, v_channel)
    i_channel = _channel(abf, _CURRENT_UNITS)
    voltages, commands, recorded = [], [], []
    for k in abf.sweepList:
        abf.setSweep(k, channel=v_channel)
        voltages.append(np.array(abf.sweepY, dtype=np.float64) * v_scale)
        if use_command:
            c_scale = _CURRENT_UNITS[abf.dacUnits[v_channel].strip()]
            commands.append(np.array(abf.sweepC, dtype=np.float64) * c_scale)
        if i_channel is not None:
            abf.setSweep(k, channel=i_channel)
            i_scale = _CURRENT_UNITS[abf.adcUnits[i_channel].strip()]
            recorded.append(np.array(abf.sweepY, dtype=np.float64) * i_scale)
    if use_command and _informative(commands, voltages):
        currents, source = commands, f"command waveform of DAC {v_channel} (epoch table)"
    elif i_channel is not None:
        currents, source = recorded, f"recorded channel {abf.adcNames[i_channel]}"
    else:
        currents, source = [None] * len(voltages), "none in file"
    sweeps = [Sweep(k, v, c) for k, (v, c) in enumerate(zip(voltages, currents, strict=True))]
    return sweeps, source


def _informative(commands: list[np.ndarray], voltages: list[np.ndarray]) -> bool:
    """A command is usable when it is finite, sweep-long and steps somewhere."""
    return all(
        c.shape == v.shape and bool(np.all(np.isfinite(c)))
        for c, v in zip(commands, voltages, strict=True)
    ) and any(np.ptp(c) > 0 for c in commands)


def _clean(text: object) -> str:
    """A header string up to its first NUL, trimmed ('' for non-strings)."""
    return text.split("\0", 1)[0].strip() if isinstance(text, str) else ""


def _metadata(abf: Any, current_source: str) -> dict:
    metadata: dict = {"abf_version": _major(abf), "current_source": current_source}
    if _major(abf) == 1:
        has_date = abf._headerV1.lFileStartDate != 0  # 0: pyabf falls back to the file's ctime
        full_header = _abf1_data_start(abf) >= _ABF1_COMMENT_NEW_END
        new_comment = _clean(abf._headerV1.sFileCommentNew) if full_header else ""
        comment = new_comment or _clean(abf._headerV1.sFileCommentOld)
    else:
        has_date = abf.abfDateTimeString != "ERROR"
        full_header = True
        comment = _clean(abf.abfFileComment)
    if has_date and isinstance(abf.abfDateTime, dt.datetime):
        metadata["date"] = abf.abfDateTime.isoformat(timespec="milliseconds")
    if full_header and abf.protocol and abf.protocol != "None":
        metadata["protocol"] = str(abf.protocol)
    if comment:
        metadata["comment"] = comment
    return metadata


def _lowpass_setting(path: Path, abf: Any, v_channel: int) -> float:
    """The header's signal low-pass setting of the voltage channel, in Hz (NaN if none)."""
    if _major(abf) == 2:
        return float(abf._adcSection.fSignalLowpassFilter[v_channel])
    adc = int(abf._headerV1.nADCSamplingSeq[v_channel])
    if _abf1_data_start(abf) < _ABF1_LOWPASS_END or not 0 <= adc < _MAX_CHANNELS:
        return float("nan")  # the field lies in the sample data, or the header is odd
    with open(path, "rb") as f:
        f.seek(_ABF1_LOWPASS + 4 * adc)
        return float(struct.unpack("<f", f.read(4))[0])


def _corner_hz(setting_hz: float, rate_hz: float) -> float | None:
    """A plausible low-pass corner from a header setting, or None (unset, bypass, junk).

    The header stores float32: the shortest decimal of that float32 is returned, so
    a setting of 3333.3 Hz reads as 3333.3, not 3333.300048828125.
    """
    low, high = _CORNER_RANGE_HZ
    if not (np.isfinite(setting_hz) and low <= setting_hz <= high and setting_hz < rate_hz / 2):
        return None
    return float(str(np.float32(setting_hz)))


def read_abf(path: str | Path) -> Recording:
    """Read an ABF 1 or ABF 2 current-clamp file.

    Parameters
    ----------
    path : str or Path
        The .abf file.

    Returns
    -------
    Recording
        Voltage in V from the first mV channel; current in A from an enabled ABF 2
        epoch table, else from a pA/nA channel, else None. Metadata: `date` (ISO),
        `protocol`, `comment`, `abf_version`, `current_source`, and `filter_hz` (the
        voltage channel's `fSignalLowpassFilter`, in Hz) when it is a plausible
        corner: 10 Hz to 1 MHz and below the Nyquist frequency.

    Raises
    ------
    LoadError
        Not ABF, damaged, truncated, or no channel in mV.
    """
    path = Path(path)
    abf = _open(path)
    _check_layout(path, abf)
    rate = _sample_rate(path, abf)
    v_channel = _channel(abf, _VOLTAGE_UNITS)
    if v_channel is None:
        raise LoadError(
            path,
            f"no voltage channel in mV (channels: {_channel_list(abf)}); "
            f"passivefit needs a current-clamp recording",
        )
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if _major(abf) == 1:
                _undo_phantom_telegraph_gain(abf)
            sweeps, current_source = _read_sweeps(abf, v_channel)
            metadata = _metadata(abf, current_source)
            filter_hz = _corner_hz(_lowpass_setting(path, abf, v_channel), rate)
    except Exception as err:  # pyabf fails in many ways on damaged sweeps
        raise LoadError(
            path, f"damaged ABF data ({_reason(err)}); re-export the file from the rig"
        ) from None
    if filter_hz is not None:
        metadata["filter_hz"] = filter_hz
    return Recording(sweeps, rate, path=str(path), format="abf", metadata=metadata)


def _stack_voltage_mV(recording: Recording, path: Path) -> np.ndarray:
    lengths = {s.n_samples for s in recording.sweeps}
    if not recording.sweeps or len(lengths) != 1:
        raise ValueError(
            f"{path}: ABF 1 needs one or more sweeps of equal length (got {sorted(lengths)})"
        )
    data_mV = np.vstack([s.voltage for s in recording.sweeps]) * 1e3
    if not np.all(np.isfinite(data_mV)):
        raise ValueError(f"{path}: the voltage holds NaN or infinite values; ABF 1 cannot")
    return data_mV


def _pack_text(text: str, size: int) -> bytes:
    return text.encode("ascii", errors="replace")[:size].ljust(size, b"\0")


def _finish_abf1_header(path: Path, metadata: dict, filter_hz: float | None) -> None:
    """Give pyabf's 2048-byte ABF 1 header its full 6144 bytes, then date, comment, filter.

    pyabf's reader takes fields up to byte 5806 from fixed offsets; with the data
    section at byte 2048 those fields are sample data (short files fail to open,
    some sample patterns change the gain). Moving the data section behind a
    zero-filled full header removes both effects.
    """
    raw = bytearray(path.read_bytes())
    old_start = struct.unpack_from("i", raw, _ABF1_DATA_PTR)[0] * _BLOCK
    new_start = _ABF1_FULL_HEADER_BLOCKS * _BLOCK
    out = raw[:old_start] + bytes(new_start - old_start) + raw[old_start:]
    struct.pack_into("i", out, _ABF1_DATA_PTR, _ABF1_FULL_HEADER_BLOCKS)
    out[_ABF1_CREATOR : _ABF1_CREATOR + 16] = _pack_text("passivefit", 16)
    comment = str(metadata.get("comment") or metadata.get("cell_id") or "")
    out[_ABF1_COMMENT_OLD : _ABF1_COMMENT_OLD + 56] = _pack_text(comment, 56)
    if metadata.get("date"):
        when = dt.datetime.fromisoformat(str(metadata["date"]))
        seconds = when.hour * 3600 + when.minute * 60 + when.second
        struct.pack_into("i", out, _ABF1_START_DATE, int(when.strftime("%Y%m%d")))
        struct.pack_into("i", out, _ABF1_START_TIME, seconds)
        struct.pack_into("h", out, _ABF1_START_MS, when.microsecond // 1000)
    if filter_hz is not None:  # pyabf's writer records ADC 0 (nADCSamplingSeq all 0)
        struct.pack_into("<f", out, _ABF1_LOWPASS, filter_hz)
    path.write_bytes(bytes(out))


def write_abf1(recording: Recording, path: str | Path) -> None:
    """Write the voltage of a recording as an ABF 1 file (int16, mV).

    The current is not written (pyabf's ABF 1 writer carries no command waveform):
    analyse such a file with ``--step``. Values are truncated toward zero to the int16
    grid that pyabf chooses from the largest |V| (3.05 uV steps up to 100 mV).
    The metadata `date`, `comment` (or `cell_id`) and `filter_hz` (as
    `fSignalLowpassFilter`, float32) are kept in the header; `read_abf` reads the
    filter back only when it is below the Nyquist frequency.

    Parameters
    ----------
    recording : Recording
        Sweeps of equal length, voltage in V.
    path : str or Path
        Target .abf file.

    Raises
    ------
    ValueError
        Sweeps of different lengths, non-finite voltage, values pyabf cannot fit
        into int16, or metadata `filter_hz` that is not a positive number.
    """
    import pyabf.abfWriter

    path = Path(path)
    data_mV = _stack_voltage_mV(recording, path)
    filter_hz = metadata_filter_hz(recording.metadata)
    try:
        pyabf.abfWriter.writeABF1(data_mV, str(path), recording.sample_rate_hz, units="mV")
    except struct.error as err:
        raise ValueError(f"{path}: voltages do not fit ABF 1 int16 ({err})") from None
    _finish_abf1_header(path, recording.metadata, filter_hz)
