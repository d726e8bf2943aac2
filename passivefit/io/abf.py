"""ABF 1 and ABF 2 files, read through pyabf; ABF 1 written through pyabf's writer.

Reading decides the clamp mode from the units (voltage clamp is refused), picks the
membrane-potential channel among the mV channels, reads the protocol from the ABF 1
or ABF 2 epoch table, and takes the injected current from a recorded current channel
(pA or nA) when it shows steps, else from the epoch table, else nothing (the user
then gives the step). Table and recorded current are checked against each other.

pyabf is imported only when an ABF file is opened.
"""

from __future__ import annotations

import datetime as dt
import struct
import warnings
from dataclasses import dataclass
from pathlib import Path, PureWindowsPath
from typing import Any

import numpy as np

from passivefit.core.qc import Flag
from passivefit.core.steps import classify_stimulus, find_step, find_steps
from passivefit.io._rate import whole_hz
from passivefit.io.recording import LoadError, Recording, Sweep, metadata_filter_hz
from passivefit.model import schema as S
from passivefit.model.protocol import (
    CURRENT_CLAMP,
    SOURCE_EPOCH_TABLE,
    SOURCE_NONE,
    SOURCE_RECORDED,
    TIMING_TOL_S,
    Epoch,
    Protocol,
    SweepProtocol,
    compare_steps,
    protocol_from_steps,
    summarize,
)

_SIGNATURES = (b"ABF ", b"ABF2")
# units, compared in lower case after NUL padding is stripped
_VOLTAGE_UNITS = {"mv": 1e-3, "v": 1.0}
# uA: two-electrode voltage clamp; pyabf reads Clampex's micro sign (byte 0xB5) as "u"
_CURRENT_UNITS = {"pa": 1e-12, "na": 1e-9, "ua": 1e-6, "\u00b5a": 1e-6, "\u03bca": 1e-6}
# a membrane potential sits in this range and varies by more than this, in V
# (common practice, no source)
_VM_RANGE_V = (-0.120, 0.020)
_VM_MIN_SPREAD_V = 0.5e-3
# a voltage channel repeating its previous sample this often is a copy of a command
_COMMAND_COPY_FRACTION = 0.98
_GAP_FREE_MODE = 3  # nOperationMode of a gap-free recording
_PRE_SWEEP_FRACTION = 64  # ABF sweeps hold 1/64 of their samples at holding first
_ABF1_EPOCHS_PER_DAC = 10
_EPOCH_KINDS = {1: "step", 2: "ramp", 3: "pulse train"}
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
_ABF1_HOLDING = 1394  # fDACHoldingLevel, 4 f (see _abf1_holding)
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


# Header fields that size what pyabf allocates, read here before pyabf sees them
# (offsets as pyabf's abf1/headerV1.py and abf2/section.py read them).
_ABF1_ACQ_LENGTH = 10  # lActualAcqLength, int32: samples of all channels
_ABF1_POINTS_IGNORED = 14  # nNumPointsIgnored, int16
_ABF1_EPISODES = 16  # lActualEpisodes, int32: sweeps (pyabf lists them all)
_ABF1_TAG_PTR = 44  # lTagSectionPtr, int32 (blocks)
_ABF1_TAG_COUNT = 48  # lNumTagEntries, int32; 64 bytes each
_ABF1_TAG_BYTES = 64
_ABF1_SAMPLE_BYTES = 2  # int16 samples (pyabf reads no other ABF 1 data format)
_ABF2_EPISODES = 12  # lActualEpisodes, uint32
_ABF2_SECTIONS = range(76, 348, 16)  # section map: uBlockIndex, uBytes, llNumEntries
_ABF2_DATA_SECTION = 236
_HEADER_BYTES = 348


def _check_declared_sizes(path: Path, head: bytes, size: int) -> None:
    """Refuse a header whose declared counts cannot fit in the file, before pyabf reads it.

    pyabf builds lists as long as the declared sweep, tag and section-entry counts, so
    one damaged field (e.g. lActualEpisodes = 2**31 - 1 in a 90 KB file) would make it
    allocate gigabytes. Every count is checked against the file's size in bytes.

    Parameters
    ----------
    path : Path
        The file (for the message).
    head : bytes
        The file's first bytes (up to `_HEADER_BYTES`).
    size : int
        The file's size, in bytes.
    """
    def field(fmt: str, at: int) -> int:
        if at + struct.calcsize(fmt) > len(head):
            raise LoadError(path, f"truncated ABF header ({size} bytes); copy it again")
        return int(struct.unpack_from(fmt, head, at)[0])

    def refuse(what: str, needed: int) -> None:
        raise LoadError(
            path,
            f"damaged ABF header: {what} would need {needed} bytes, the file has {size}; "
            f"copy it again from the rig",
        )

    def truncated(needed: int) -> None:
        raise LoadError(path, f"truncated ABF file: the header promises {needed} bytes, the "
                              f"file has {size}; copy it again from the rig")

    if head[:4] == b"ABF ":
        samples, episodes = field("<i", _ABF1_ACQ_LENGTH), field("<i", _ABF1_EPISODES)
        if samples < 0 or episodes < 0:
            raise LoadError(path, f"damaged ABF header: negative counts (lActualAcqLength "
                                  f"`{samples}`, lActualEpisodes `{episodes}`); copy it again")
        data_end = (field("<i", _ABF1_DATA_PTR) * _BLOCK + field("<h", _ABF1_POINTS_IGNORED)
                    + samples * _ABF1_SAMPLE_BYTES)
        if data_end > size:
            truncated(data_end)
        if episodes > max(samples, 1):
            refuse(f"the declared {episodes} sweeps (of {samples} samples)",
                   episodes * _ABF1_SAMPLE_BYTES)
        tags = field("<i", _ABF1_TAG_COUNT)
        tags_end = field("<i", _ABF1_TAG_PTR) * _BLOCK + tags * _ABF1_TAG_BYTES
        if tags > 0 and tags_end > size:
            refuse(f"the declared {tags} tags", tags_end)
        return
    episodes = field("<I", _ABF2_EPISODES)
    data_entries = 0
    for at in _ABF2_SECTIONS:
        block, entry_bytes, entries = field("<I", at), field("<I", at + 4), field("<i", at + 8)
        if entries <= 0:
            continue
        end = block * _BLOCK + entry_bytes * entries
        if at == _ABF2_DATA_SECTION and entries <= size < end:
            truncated(end)  # the data are cut short; the header itself is sound
        if end > size or entries > size:
            refuse(f"the section listed at byte {at} ({entries} entries of {entry_bytes} bytes)",
                   max(end, entries))
        if at == _ABF2_DATA_SECTION:
            data_entries = entries
    if episodes > max(data_entries, 1):
        refuse(f"the declared {episodes} sweeps (of {data_entries} samples)", episodes)


def _open(path: Path) -> Any:
    """Open the header with pyabf; every pyabf failure becomes a LoadError."""
    with open(path, "rb") as f:
        head = f.read(_HEADER_BYTES)
        size = f.seek(0, 2)
    signature = head[:4]
    if signature not in _SIGNATURES:
        raise LoadError(path, f"not an ABF file (bad signature {signature!r}); {_supported_text()}")
    _check_declared_sizes(path, head, size)
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


def _units_scale(units: str, table: dict[str, float]) -> float | None:
    return table.get(_clean(units).lower())


def _channel_label(abf: Any, ch: int) -> str:
    name = _clean(abf.adcNames[ch]) or f"channel {ch}"
    return f"{name} [{_clean(abf.adcUnits[ch])}]"


def _channel_list(abf: Any) -> str:
    return ", ".join(f"{k}: {_channel_label(abf, ch)}" for k, ch in enumerate(abf.channelList))


def _channel_data(abf: Any, ch: int, scale: float, dtype=np.float32) -> list[np.ndarray]:
    """Every sweep of one input channel, copied, in SI units, as float32 by default.

    ABF data are 16-bit ADC samples (or float32 in float-format files); float32 holds
    them to within round-off at half the memory of float64. Each value is scaled in
    float64 and then rounded once to `dtype`. (A recorded current is read as float64:
    the step finder's thresholds were set on float64 currents.)
    """
    out = []
    for k in abf.sweepList:
        abf.setSweep(k, channel=ch)
        out.append((np.asarray(abf.sweepY, dtype=np.float64) * scale).astype(dtype, copy=False))
    return out


def _channel_views(abf: Any, ch: int) -> list[np.ndarray]:
    """Every sweep of one input channel as pyabf holds it (views, in the file's unit):
    looked at before choosing the channel, so that only the chosen one is copied."""
    out = []
    for k in abf.sweepList:
        abf.setSweep(k, channel=ch)
        out.append(abf.sweepY)
    return out


def _vm_problem(traces: list[np.ndarray], scale: float = 1.0) -> str | None:
    """Why a voltage channel is not a membrane potential, or None when it looks like one.

    `traces` times `scale` are in V. A membrane potential sits roughly within −120…+20 mV,
    varies by more than 0.5 mV (steps, noise, events) and is not piecewise constant like
    a copy of a command (common practice, no source).
    """
    allv = np.concatenate(traces)  # one copy, sorted in place by the percentiles
    low, median, high = (float(x) * scale for x in np.percentile(allv, [1, 50, 99],
                                                                 overwrite_input=True))
    if scale < 0:
        low, high = high, low
    del allv
    if not _VM_RANGE_V[0] <= median <= _VM_RANGE_V[1]:
        return f"sits at {median * 1e3:.4g} mV, outside −120…+20 mV"
    if high - low < _VM_MIN_SPREAD_V:
        return f"is flat ({(high - low) * 1e3:.3g} mV between its 1st and 99th percentile)"
    flat = sum(int(np.count_nonzero(np.diff(t) == 0)) for t in traces)
    steady = flat / max(sum(t.size - 1 for t in traces), 1)
    if steady > _COMMAND_COPY_FRACTION:
        return "is piecewise constant, like a copy of a command"
    return None


def _resolve_channel(path: Path, abf: Any, channel: int | str) -> int:
    """The input channel named by index (0-based, in file order) or by name."""
    channels = list(abf.channelList)
    if isinstance(channel, (int, np.integer)) and not isinstance(channel, bool):
        if 0 <= int(channel) < len(channels):
            return channels[int(channel)]
    else:
        wanted = str(channel).strip().lower()
        named = [ch for ch in channels if _clean(abf.adcNames[ch]).lower() == wanted]
        if named:
            return named[0]
        if wanted.isdigit() and int(wanted) < len(channels):
            return channels[int(wanted)]
    raise LoadError(path, f"no channel {channel!r} in this file (channels: {_channel_list(abf)}); "
                          f"give `channel` as one of these indices or names")


def _drive_dac(abf: Any) -> int:
    """The output (DAC) that plays the stimulus: the first with its waveform enabled.

    ABF 1 names an "active" DAC as well; it is kept when its waveform is enabled, but an
    ABF 1 file may name DAC 0 while only DAC 1 plays an epoch table.
    """
    if _major(abf) == 1:
        active = int(abf._headerV1.nActiveDACChannel)
        enabled = [d for d, on in enumerate(abf._headerV1.nWaveformEnable) if on]
        return active if active in enabled or not enabled else enabled[0]
    enabled = [d for d, on in enumerate(abf._dacSection.nWaveformEnable) if on]
    return enabled[0] if enabled else 0


def _dac_units(abf: Any, dac: int) -> str:
    return _clean(abf.dacUnits[dac]) if 0 <= dac < len(abf.dacUnits) else ""


def _waveform_source(abf: Any, dac: int) -> int:
    """What a DAC plays: 1 its epoch table, 2 a stimulus file, 0 nothing (disabled)."""
    if _major(abf) == 1:
        header = abf._headerV1
        enable, source = header.nWaveformEnable, header.nWaveformSource
    else:
        enable, source = abf._dacSection.nWaveformEnable, abf._dacSection.nWaveformSource
    if 0 <= dac < min(len(enable), len(source)) and enable[dac]:
        return int(source[dac])
    return 0


def _epoch_table_enabled(abf: Any, dac: int) -> bool:
    return _waveform_source(abf, dac) == 1


def _stimulus_file(abf: Any, dac: int) -> str | None:
    """The name of the stimulus file a DAC played (kept outside the recording; ABF 1
    headers do not name it); None when it played none."""
    if _waveform_source(abf, dac) != 2:
        return None
    try:
        index = abf._dacSection.lDACFilePathIndex[dac]
        name = PureWindowsPath(_clean(abf._stringsSection._indexedStrings[index])).name
    except (AttributeError, IndexError, TypeError):
        name = ""
    return name or "not named in the header"


def _abf1_holding(path: Path, abf: Any, dac: int) -> float:
    """ABF 1 `fDACHoldingLevel` of one DAC, in DAC units (0 when the header lacks it).

    pyabf's `holdingCommand` on ABF 1 is the epoch-level list, so the field is read
    from the header here: 4 floats at byte 1394, after fDACScaleFactor (1378), from
    memory, consistent with pyabf's offsets of sDACChannelName (1306) and
    nActiveDACChannel (1440), and checked on a real file whose command copy rests at
    the −50 mV this field holds (tests/test_io_real.py).
    """
    if _abf1_data_start(abf) < _ABF1_HOLDING + 16 or not 0 <= dac < 4:
        return 0.0
    with open(path, "rb") as f:
        f.seek(_ABF1_HOLDING + 4 * dac)
        value = float(struct.unpack("<f", f.read(4))[0])
    return value if np.isfinite(value) and abs(value) < 1e6 else 0.0


def _epoch_rows(abf: Any, dac: int) -> list[tuple]:
    """(type, level, level increment, duration, duration increment, period, width) rows."""
    if _major(abf) == 2:
        e = abf._epochPerDacSection
        rows = sorted((k for k in range(len(e.nDACNum)) if e.nDACNum[k] == dac),
                      key=lambda k: e.nEpochNum[k])
        return [(e.nEpochType[k], e.fEpochInitLevel[k], e.fEpochLevelInc[k],
                 e.lEpochInitDuration[k], e.lEpochDurationInc[k],
                 e.lEpochPulsePeriod[k], e.lEpochPulseWidth[k]) for k in rows]
    h = abf._headerV1
    first = dac * _ABF1_EPOCHS_PER_DAC
    return [(h.nEpochType[k], h.fEpochInitLevel[k], h.fEpochLevelInc[k],
             h.lEpochInitDuration[k], h.lEpochDurationInc[k], 0, 0)
            for k in range(first, min(first + _ABF1_EPOCHS_PER_DAC, len(h.nEpochType)))]


def epoch_protocol(path: Path, abf: Any, dac: int, n_samples: int, rate: float) -> Protocol:
    """Every sweep's epochs from the ABF 1 or ABF 2 epoch table of one DAC, in A.

    The epochs start after the 1/64 of each sweep that ABF files hold at the holding
    level; level and duration grow by their increments from sweep to sweep.
    """
    scale = _units_scale(_dac_units(abf, dac), _CURRENT_UNITS) or 1.0
    if _major(abf) == 2:
        holding = float(abf._dacSection.fDACHoldingLevel[dac])
    else:
        holding = _abf1_holding(path, abf, dac)
    rows = _epoch_rows(abf, dac)
    sweeps = []
    for k in range(abf.sweepCount):
        at = n_samples // _PRE_SWEEP_FRACTION
        epochs = []
        for kind, level, level_inc, duration, duration_inc, period, width in rows:
            if kind == 0:
                continue
            samples = max(int(duration) + k * int(duration_inc), 0)
            epochs.append(Epoch(at / rate, samples / rate, (level + k * level_inc) * scale,
                                _EPOCH_KINDS.get(int(kind), "other"),
                                period / rate if kind == 3 else 0.0,
                                width / rate if kind == 3 else 0.0))
            at += samples
        sweeps.append(SweepProtocol(tuple(epochs), holding * scale))
    return Protocol(tuple(sweeps), SOURCE_EPOCH_TABLE)


def _user_list_flag(abf: Any) -> Flag | None:
    """A flag when the epoch table varies a parameter through a user list."""
    enabled = [bool(x) for x in (abf.userListEnable or []) if x is not None]
    if not any(enabled):
        return None
    values = abf.userList if isinstance(abf.userList, list) else []
    shown = ", ".join(f"{v:g}" for v in values[:12] if isinstance(v, float)) or "unreadable"
    return S.PROTOCOL_USER_LIST.make(values=shown)


def _refusal(abf: Any, source: str, currents: list[np.ndarray] | None, rate: float,
             protocol: Protocol | None) -> str | None:
    """Why an ABF file cannot be analysed for its stimulus, or None."""
    if currents is None:
        return None
    kinds = {classify_stimulus(c, rate) for c in currents}
    if kinds & {"step", "pulse"}:
        return None
    table = protocol.kinds if protocol is not None else set()
    need = "passivefit needs current clamp with current steps"
    if "ramp" in kinds or "ramp" in table:
        return f"a current-ramp recording with no current step ({source}); {need}"
    if int(abf.nOperationMode) == _GAP_FREE_MODE:
        return f"a gap-free recording with no current step ({source} holds no step); {need}"
    if "waveform" in kinds or "other" in table:
        return f"a stimulus with no current step (a sine or other waveform, {source}); {need}"
    return None


def _follows_command(cmd_steps: list[list], rec_steps: list[list]) -> bool:
    """Whether a recorded current witnesses the command: it shows, in some sweep, a step
    starting where a command step starts (or the command has no step to check).

    A current channel of another cell or amplifier (a paired recording: cell 1 in current
    clamp, cell 2 in voltage clamp) shows its own steps at other times; it is then not the
    current that this DAC injected. Amplitudes are not compared: a recorded current may
    rightly differ from the command there.
    """
    if not any(cmd_steps):
        return True
    return any(abs(r.onset_s - c.onset_s) <= max(TIMING_TOL_S, 0.5 * c.duration_s)
               for planned, seen in zip(cmd_steps, rec_steps, strict=True)
               for c in planned for r in seen)


@dataclass
class _Current:
    """The current chosen for a file's sweeps, and what was noticed choosing it."""

    currents: list[np.ndarray] | None
    source: str
    detail: str
    channel: str
    protocol: Protocol | None
    flags: list[Flag]


def _choose_current(path: Path, abf: Any, rate: float, dac: int, command_units: str,
                    amps: list[int]) -> _Current:
    """Recorded current when it shows steps, else the epoch table; each checked by the other."""
    n = int(abf.sweepPointCount)
    flags: list[Flag] = []
    protocol = commands = None
    if _units_scale(command_units, _CURRENT_UNITS) and _epoch_table_enabled(abf, dac):
        protocol = epoch_protocol(path, abf, dac, n, rate)
        commands = [sp.command(n, rate) for sp in protocol.sweeps]
        user_list = _user_list_flag(abf)
        if user_list is not None:
            flags.append(user_list)
    recorded, i_label = None, ""
    if amps:
        i_label = _channel_label(abf, amps[0])
        recorded = _channel_data(abf, amps[0], _units_scale(abf.adcUnits[amps[0]],
                                                            _CURRENT_UNITS) or 1.0, np.float64)
    rec_steps = [find_steps(r, rate) for r in recorded] if recorded is not None else []
    cmd_steps = [find_steps(c, rate) for c in commands] if commands is not None else []
    listed = any(f.code == S.PROTOCOL_USER_LIST.code for f in flags)  # the table may be off
    if recorded is not None and (any(rec_steps) or not any(cmd_steps)) and (
            listed or _follows_command(cmd_steps, rec_steps)):
        current = _Current(recorded, SOURCE_RECORDED, f"recorded channel {i_label}", i_label,
                           protocol or protocol_from_steps(rec_steps, SOURCE_RECORDED), flags)
    elif commands is not None:
        current = _Current(commands, SOURCE_EPOCH_TABLE, f"epoch table of DAC {dac}",
                           f"DAC {dac} [{command_units}]", protocol, flags)
    else:
        return _Current(None, SOURCE_NONE, "no current", "", None, flags)
    if recorded is not None and any(cmd_steps):
        found = []
        for k, (c, r) in enumerate(zip(cmd_steps, rec_steps, strict=True)):
            found += compare_steps(k, c, r, f"epoch table (DAC {dac})")
        flags += summarize(found)
    return current


def _response_V(traces: list[np.ndarray], currents: list[np.ndarray] | None,
                rate: float) -> float:
    """Summed |mean V in the second half of each sweep's step − mean V before it|, in V."""
    if currents is None:
        return 0.0
    total = 0.0
    for v, c in zip(traces, currents, strict=True):
        step = find_step(c, rate)
        if step is None:
            continue
        before = v[step.baseline_start : step.onset].mean(dtype=np.float64)
        during = v[(step.onset + step.offset) // 2 : step.offset].mean(dtype=np.float64)
        total += abs(float(during - before))
    return total


def _choose_voltage(path: Path, abf: Any, volt: list[int], channel: int | str | None,
                    current: _Current, rate: float) -> tuple[int, list[np.ndarray], list[Flag]]:
    """The membrane-potential channel: the user's, or the plausible one that answers steps."""
    if channel is not None:
        v_ch = _resolve_channel(path, abf, channel)
        if v_ch not in volt:
            raise LoadError(path, f"channel {_channel_label(abf, v_ch)} is not a voltage "
                                  f"(channels: {_channel_list(abf)}); choose one in mV")
        return v_ch, _channel_data(abf, v_ch, _units_scale(abf.adcUnits[v_ch],
                                                           _VOLTAGE_UNITS) or 1.0), []
    scales = {c: _units_scale(abf.adcUnits[c], _VOLTAGE_UNITS) or 1.0 for c in volt}
    views = {c: _channel_views(abf, c) for c in volt}   # in the file's unit, not copied
    problems = {c: _vm_problem(views[c], scales[c]) for c in volt}
    good = [c for c in volt if problems[c] is None]
    if len(volt) == 1 and (problems[volt[0]] or "").startswith("is flat"):
        good = volt  # the only channel: `validate` names a flat sweep
    if not good:
        listed = "; ".join(f"{_channel_label(abf, c)} {problems[c]}" for c in volt)
        raise LoadError(path, f"no channel looks like a membrane potential ({listed}); "
                              f"choose one with `channel` if one is")
    responses = {c: abs(scales[c]) * _response_V(views[c], current.currents, rate)
                 for c in good}
    v_ch = max(good, key=lambda c: responses[c])  # the first of equals: max keeps order
    traces = _channel_data(abf, v_ch, scales[v_ch])
    if len(volt) == 1:
        return v_ch, traces, []
    median_mV = float(np.median(np.concatenate(traces))) * 1e3
    others = "; ".join(
        f"{_channel_label(abf, c)} "
        + (problems[c] or f"answers the steps less ({responses[c] * 1e3:.3g} mV in all "
                          f"against {responses[v_ch] * 1e3:.3g} mV)")
        for c in volt if c != v_ch)
    flag = S.PROTOCOL_CHANNEL.make(median_mV * 1e-3, channel=_channel_label(abf, v_ch),
                                   median=f"{median_mV:.1f} mV", others=others)
    return v_ch, traces, [flag]


def _read(path: Path, abf: Any, rate: float, channel: int | str | None) -> Recording:
    channels = list(abf.channelList)
    volt = [c for c in channels if _units_scale(abf.adcUnits[c], _VOLTAGE_UNITS)]
    amps = [c for c in channels if _units_scale(abf.adcUnits[c], _CURRENT_UNITS)]
    dac = _drive_dac(abf)
    command_units = _dac_units(abf, dac)
    if amps and _units_scale(command_units, _VOLTAGE_UNITS):
        raise LoadError(
            path,
            f"a voltage-clamp recording (current recorded in {_clean(abf.adcUnits[amps[0]])}, "
            f"command in {command_units}); passivefit needs current clamp with current steps")
    if not volt:
        raise LoadError(
            path,
            f"no voltage channel in mV (channels: {_channel_list(abf)}); "
            f"passivefit needs a current-clamp recording")
    current = _choose_current(path, abf, rate, dac, command_units, amps)
    reason = _refusal(abf, current.detail, current.currents, rate, current.protocol)
    if reason is not None:
        raise LoadError(path, reason)
    v_ch, voltages, channel_flags = _choose_voltage(path, abf, volt, channel, current, rate)
    currents = current.currents
    sweeps = [Sweep(k, v, None if currents is None else currents[k])
              for k, v in enumerate(voltages)]
    rec = Recording(sweeps, rate, path=str(path), format="abf",
                    metadata=_metadata(abf, current.source),
                    flags=(*channel_flags, *current.flags), current_source=current.source,
                    clamp_mode=CURRENT_CLAMP, voltage_channel=_channel_label(abf, v_ch),
                    protocol=current.protocol)
    rec.metadata["voltage_channel"] = rec.voltage_channel
    if current.channel:
        rec.metadata["current_channel"] = current.channel
    stimulus_file = _stimulus_file(abf, dac)
    if stimulus_file is not None:
        rec.metadata["stimulus_file"] = stimulus_file
    filter_hz = _corner_hz(_lowpass_setting(path, abf, v_ch), rate)
    if filter_hz is not None:
        rec.metadata["filter_hz"] = filter_hz
    return rec


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


def read_abf(path: str | Path, channel: int | str | None = None) -> Recording:
    """Read an ABF 1 or ABF 2 current-clamp file.

    The clamp mode comes from the units: a current input (pA, nA) with a command in
    mV is voltage clamp and is refused. The membrane potential is the first channel
    in mV that looks like one (see `_vm_problem`), unless `channel` names it. The
    current is the recorded current channel when it shows steps (the better witness
    of what was played), else the command drawn from the ABF 1 or ABF 2 epoch table;
    where both exist they are compared and every disagreement is a flag on the
    Recording.

    Parameters
    ----------
    path : str or Path
        The .abf file.
    channel : int or str, optional
        Membrane-potential channel: index among the file's input channels (from 0)
        or name.

    Returns
    -------
    Recording
        Voltage in V, current in A (or None when the file holds no current and no
        epoch table); `current_source`, `voltage_channel`, `protocol` and `flags`
        set. Metadata: `date` (ISO), `protocol`, `comment`, `abf_version`,
        `current_source`, `voltage_channel`, `current_channel`, `stimulus_file` (the
        waveform file the command was played from, which the recording does not hold:
        its current is then only the recorded one, if any), and `filter_hz` (the
        voltage channel's `fSignalLowpassFilter`, in Hz) when it is a plausible
        corner: 10 Hz to 1 MHz and below the Nyquist frequency.

    Raises
    ------
    LoadError
        Not ABF, damaged, truncated, voltage clamp, no membrane-potential channel,
        an unknown `channel`, or a stimulus without a current step (ramp, sine,
        gap-free recording).
    """
    path = Path(path)
    abf = _open(path)
    _check_layout(path, abf)
    rate = _sample_rate(path, abf)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if _major(abf) == 1:
                _undo_phantom_telegraph_gain(abf)
            return _read(path, abf, rate, channel)
    except LoadError:
        raise
    except Exception as err:  # pyabf fails in many ways on damaged sweeps
        raise LoadError(
            path, f"damaged ABF data ({_reason(err)}); re-export the file from the rig"
        ) from None
    finally:
        # pyabf's reader is in a reference cycle with its stimulus objects, so it lives
        # until the next garbage collection: its whole-file sample buffer goes now
        abf.data = None


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
