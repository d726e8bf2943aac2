"""NWB 2 intracellular electrophysiology (icephys) files.

Reading takes the current-clamp sweeps of the `intracellular_recordings` table, or,
in files without that table, pairs `acquisition` responses with `stimulus` series by
sweep number. Writing fills the icephys tables (electrode, one stimulus and one
response series per sweep, intracellular recordings, simultaneous and sequential
recordings) so other NWB tools see a complete file.

Two readers give the same `Recording`: `read_nwb_hdf5` reads the common icephys
layouts straight from the HDF5 groups with h5py (no pynwb import, no object mapping:
about a second faster), and `read_nwb_pynwb` reads any NWB file through pynwb.
`read_nwb` tries the first and falls back to the second for anything it does not
recognise and for every damaged file, so all error messages come from pynwb's path.
pynwb is imported only when a file needs it or is written.
"""

from __future__ import annotations

import datetime as dt
import re
import uuid
import warnings
from decimal import Decimal
from pathlib import Path
from typing import Any

import numpy as np

from passivefit.io._rate import rate_from_times, whole_hz
from passivefit.io.recording import LoadError, Recording, Sweep, metadata_filter_hz

_TEMPERATURE = re.compile(
    r"temperature(?:_C)?\s*[:=]\s*(?P<value>[-+]?\d+(?:\.\d*)?)", re.IGNORECASE
)
# a frequency with its unit in free text: "5000 Hz", "2.5 kHz", "10KHz", "1e4 Hz"
_FREQUENCY = re.compile(
    r"(?<![\w.])(?P<value>\d+(?:\.\d*)?(?:[eE][-+]?\d+)?)\s*(?P<prefix>[kKM]?)[Hh][Zz]\b"
)
_PREFIX_EXPONENT = {"": 0, "k": 3, "K": 3, "M": 6}
_HIGH_PASS = re.compile(r"high[\s-]?pass", re.IGNORECASE)
_V_UNITS_PER_SI = 1e3  # responses stored in mV (float32), conversion 1e-3 to V
_I_UNITS_PER_SI = 1e12  # stimuli stored in pA (float32), conversion 1e-12 to A
# amplifier settings of a CurrentClampSeries (NWB field, SI unit) -> metadata key
AMPLIFIER_SETTINGS = {
    "bias_current": "bias_current_A",
    "bridge_balance": "bridge_balance_ohm",
    "capacitance_compensation": "capacitance_compensation_F",
}


def _settings_metadata(per_sweep: list[dict]) -> dict:
    """Metadata entries for the amplifier settings of every sweep's response series.

    A setting the same in every sweep is one float; one that varies is a list with
    one value per sweep (None where a sweep does not give it); absent settings are
    left out.
    """
    out: dict = {}
    for field, key in AMPLIFIER_SETTINGS.items():
        values = [d.get(field) for d in per_sweep]
        if all(v is None for v in values):
            continue
        floats = [None if v is None else float(v) for v in values]
        out[key] = floats[0] if len(set(floats)) == 1 else floats
    return out


def _finish(recording: Recording) -> Recording:
    """Current source and protocol of a recording whose current is its stimulus series."""
    from passivefit.core.steps import find_steps
    from passivefit.model.protocol import SOURCE_NONE, SOURCE_STIMULUS, protocol_from_steps

    if recording.has_current:
        recording.current_source = SOURCE_STIMULUS
        fs = recording.sample_rate_hz
        recording.protocol = protocol_from_steps(
            [find_steps(s.current, fs) for s in recording.sweeps], SOURCE_STIMULUS)
    else:
        recording.current_source = SOURCE_NONE
    return recording


def _setting_of(metadata: dict, key: str, sweep: int) -> float | None:
    """One sweep's amplifier setting from metadata written by `_settings_metadata`."""
    value = metadata.get(key)
    if isinstance(value, (list, tuple)):
        value = value[sweep] if sweep < len(value) else None
    try:
        number = None if value is None else float(value)
    except (TypeError, ValueError):
        return None
    return number if number is not None and np.isfinite(number) else None


def filter_hz_from_text(text: str | None) -> float | None:
    """The low-pass corner named in an electrode's `filtering` text, in Hz.

    Frequencies are numbers followed by Hz, kHz or MHz. One that follows the words
    "high-pass" (since the previous frequency) is a high-pass corner and is skipped;
    of the others the lowest is the low-pass corner (it dominates a cascade).

    Parameters
    ----------
    text : str or None
        Free text such as ``"low-pass 4-pole Bessel, -3 dB at 5 kHz"``.

    Returns
    -------
    float or None
        The corner in Hz, None when the text names no positive frequency.
    """
    corners, previous_end = [], 0
    for match in _FREQUENCY.finditer(text or ""):
        high_pass = _HIGH_PASS.search(text, previous_end, match.start()) is not None
        previous_end = match.end()
        # scaled in decimal: "3.3 kHz" is 3300.0, not 3.3 * 1e3 = 3299.9999999999995
        hz = float(Decimal(match["value"]).scaleb(_PREFIX_EXPONENT[match["prefix"]]))
        if not high_pass and np.isfinite(hz) and hz > 0:
            corners.append(hz)
    return min(corners) if corners else None


def filtering_text(filter_hz: float) -> str:
    """The `filtering` text written for a low-pass corner of `filter_hz` Hz."""
    return f"low-pass, -3 dB at {filter_hz:.10g} Hz"


def _reason(err: BaseException) -> str:
    kind = type(err)
    name = kind.__name__ if kind.__module__ == "builtins" else f"{kind.__module__}.{kind.__name__}"
    text = str(err).strip()
    return f"{name}: {text.splitlines()[0]}" if text else name


# ---------------------------------------------------------------- reading


def _si(series: Any, start: int = 0, count: int | None = None) -> np.ndarray:
    """A series' samples in SI units (data * conversion + offset), copied to memory."""
    stop = None if count is None or count < 0 else start + count
    raw = np.array(series.data[start:stop], dtype=np.float64)
    offset = float(getattr(series, "offset", 0.0) or 0.0)
    return raw * float(series.conversion) + offset


def _series_rate(series: Any) -> float:
    if series.rate is not None:
        return whole_hz(float(series.rate))
    return rate_from_times(np.asarray(series.timestamps[:], dtype=np.float64))


def _table_pairs(nwb: Any, current_clamp: tuple[type, ...]) -> list[tuple[Any, Any]]:
    """(response reference, stimulus reference or None) per current-clamp table row."""
    table = nwb.intracellular_recordings
    responses = table.get_category("responses")["response"]
    stimulus_table = table.get_category("stimuli")
    stimuli = stimulus_table["stimulus"] if "stimulus" in stimulus_table.colnames else None
    pairs = []
    for row in range(len(table)):
        response = responses[row]
        if not isinstance(response.timeseries, current_clamp):
            continue
        stimulus = stimuli[row] if stimuli is not None else None
        if stimulus is not None and (stimulus.timeseries is None or stimulus.count < 0):
            stimulus = None
        pairs.append((response, stimulus))
    return pairs


def _acquisition_pairs(nwb: Any, current_clamp: tuple[type, ...]) -> list[tuple[Any, Any]]:
    """Responses in `acquisition`, with the `stimulus` series of the same sweep number."""
    from pynwb.icephys import CurrentClampStimulusSeries

    responses = [s for s in nwb.acquisition.values() if isinstance(s, current_clamp)]
    stimuli = {
        s.sweep_number: s
        for s in nwb.stimulus.values()
        if isinstance(s, CurrentClampStimulusSeries) and s.sweep_number is not None
    }
    responses.sort(key=lambda s: (s.sweep_number is None, s.sweep_number or 0, s.name))
    return [
        (r, stimuli.get(r.sweep_number) if r.sweep_number is not None else None) for r in responses
    ]


#: Response types that are not current clamp, as the flag names them
_OTHER_CLAMP = {"VoltageClampSeries": "voltage clamp", "IZeroClampSeries": "I = 0"}


def _numbers_by_kind(typed) -> dict[str, list]:
    """Sweep numbers (None where absent) of the (type name, sweep number) pairs whose type
    is voltage clamp or I = 0, by kind; the other types are left out."""
    found: dict[str, list] = {}
    for type_name, number in typed:
        kind = _OTHER_CLAMP.get(type_name)
        if kind is not None:
            found.setdefault(kind, []).append(None if number is None else int(number))
    return found


def _other_clamp(nwb: Any) -> dict[str, list]:
    """Sweep numbers (None where a series has none) of the responses recorded in voltage
    clamp or at I = 0, by kind ("voltage clamp", "I = 0"): of the table's rows, or of
    `acquisition` in a file without a table (where its sweeps are read from)."""
    table = nwb.intracellular_recordings
    if table is not None and len(table) > 0:
        responses = table.get_category("responses")["response"]
        series = [responses[row].timeseries for row in range(len(table))]
    else:
        series = list(nwb.acquisition.values())
    unique = {id(s): s for s in series if s is not None}.values()
    return _numbers_by_kind((type(s).__name__, s.sweep_number) for s in unique)


def _other_clamp_flag(others: dict[str, list]) -> tuple:
    """The protocol.other_clamp flag of sweeps left out by clamp mode (none without any)."""
    from passivefit.model import schema as S

    numbers = [n for group in others.values() for n in group]
    if not numbers:
        return ()
    which = (", ".join(str(int(n)) for n in sorted(numbers)) if None not in numbers
             else "without sweep numbers")
    return (S.PROTOCOL_OTHER_CLAMP.make(len(numbers), count=len(numbers),
                                        kinds=" and ".join(sorted(others)), which=which),)


def _cut(item: Any) -> tuple[Any, int, int | None]:
    """(series, start, count) of a table reference or of a whole series."""
    if hasattr(item, "timeseries"):
        return item.timeseries, int(item.idx_start), int(item.count)
    return item, 0, None


def _sweep_numbers(numbers: list) -> list[int]:
    """The file's own sweep numbers when every current-clamp sweep has a distinct one (so
    a sweep is named as in the acquisition program, voltage-clamp sweeps between them
    or not), else 0, 1, 2, … in their order."""
    if any(n is None for n in numbers) or len(set(numbers)) != len(numbers):
        return list(range(len(numbers)))
    return [int(n) for n in numbers]


def _one_rate(sweeps: list[Sweep], rates: list[float], settings: list[dict]):
    """The sweeps at the sampling rate most of them share (the first sweep's on a tie),
    their settings, and a flag naming those left out at other rates (none if one rate)."""
    from collections import Counter

    from passivefit.model import schema as S

    counts = Counter(rates)
    if len(counts) < 2:
        return sweeps, rates[0] if rates else float("nan"), settings, ()
    rate = max(counts, key=lambda r: (counts[r], -rates.index(r)))
    keep = [k for k, r in enumerate(rates) if r == rate]
    others = ", ".join(f"{n} at {r:g} Hz" for r, n in counts.items() if r != rate)
    flag = S.PROTOCOL_RATES.make(float(len(sweeps) - len(keep)), kept=f"{len(keep)} sweeps",
                                 rate=f"{rate:g} Hz", others=others)
    return [sweeps[k] for k in keep], rate, [settings[k] for k in keep], (flag,)


def _read_sweeps(
    path: Path, pairs: list[tuple[Any, Any]]
) -> tuple[list[Sweep], float, list[dict], tuple]:
    """The sweeps of the pairs, at one sampling rate (`_one_rate`), their amplifier
    settings, and the flag of sweeps left out at other rates."""
    sweeps, rates, settings = [], [], []
    numbers = _sweep_numbers([getattr(_cut(r)[0], "sweep_number", None) for r, _ in pairs])
    for k, (response, stimulus) in zip(numbers, pairs, strict=True):
        series, start, count = _cut(response)
        settings.append({f: getattr(series, f, None) for f in AMPLIFIER_SETTINGS})
        voltage = _si(series, start, count)
        rates.append(_series_rate(series))
        current = None
        if stimulus is not None:
            s_series, s_start, s_count = _cut(stimulus)
            current = _si(s_series, s_start, s_count)
            if current.shape != voltage.shape:
                raise LoadError(
                    path,
                    f"sweep {k}: stimulus has {current.size} samples, response {voltage.size}; "
                    f"the file's stimulus and response do not match",
                )
        sweeps.append(Sweep(k, voltage, current))
    return _one_rate(sweeps, rates, settings)


def _electrode(nwb: Any) -> Any:
    electrodes = getattr(nwb, "icephys_electrodes", None) or {}
    return next(iter(electrodes.values()), None)


def _metadata(nwb: Any, electrode: Any = None) -> dict:
    metadata: dict = {}
    electrode = electrode if electrode is not None else _electrode(nwb)
    cell_id = getattr(electrode, "cell_id", None) if electrode is not None else None
    metadata["cell_id"] = str(cell_id or nwb.identifier)
    metadata["identifier"] = str(nwb.identifier)
    if nwb.session_start_time is not None:
        metadata["date"] = nwb.session_start_time.isoformat()
    texts = {
        "session_description": nwb.session_description,
        "lab": nwb.lab,
        "institution": nwb.institution,
        "electrode": getattr(electrode, "description", None),
        "protocol": nwb.protocol,
        "notes": nwb.notes,
    }
    subject = nwb.subject
    if subject is not None:
        texts.update(subject_id=subject.subject_id, species=subject.species)
    metadata.update({k: str(v) for k, v in texts.items() if v})
    match = _TEMPERATURE.search(str(nwb.notes or ""))
    if match:
        metadata["temperature_C"] = float(match["value"])
    filter_hz = filter_hz_from_text(getattr(electrode, "filtering", None))
    if filter_hz is not None:
        metadata["filter_hz"] = filter_hz
    return metadata


def _check_signature(path: Path) -> None:
    with open(path, "rb") as f:
        head = f.read(8)
    if head != b"\x89HDF\r\n\x1a\n":
        from passivefit.io import supported_extensions

        raise LoadError(
            path,
            "not an NWB file (no HDF5 signature); passivefit reads "
            + ", ".join(supported_extensions()),
        )


def _electrode_of(pair: tuple[Any, Any]) -> Any:
    return getattr(_cut(pair[0])[0], "electrode", None)


def _one_electrode(
    path: Path, nwb: Any, pairs: list[tuple[Any, Any]], channel: int | str | None
) -> tuple[list[tuple[Any, Any]], Any, tuple]:
    """The pairs of one electrode (one cell), that electrode, and the choice as a flag.

    Sweeps of different electrodes are different cells and are never mixed: the
    electrode named by `channel` (its name, or its index among the electrodes with
    current-clamp sweeps) is read, by default the first one in the file's order.
    """
    from passivefit.model import schema as S

    order = list((getattr(nwb, "icephys_electrodes", None) or {}).values())
    found = []
    for pair in pairs:
        electrode = _electrode_of(pair)
        if electrode is not None and all(electrode is not e for e in found):
            found.append(electrode)
    found.sort(key=lambda e: next((k for k, o in enumerate(order) if o is e), len(order)))
    names = [str(e.name) for e in found]
    if channel is None:
        chosen = found[0] if found else _electrode(nwb)
    elif isinstance(channel, int) or str(channel).isdigit():
        index = int(channel)
        if not 0 <= index < len(found):
            raise LoadError(path, f"no electrode {index} in this file (electrodes: "
                                  f"{_listing(names)}); name one of them")
        chosen = found[index]
    else:
        matches = [e for e in found if str(e.name).lower() == str(channel).strip().lower()]
        if not matches:
            raise LoadError(path, f"no electrode `{channel}` with current-clamp sweeps in this "
                                  f"file (electrodes: {_listing(names)}); name one of them")
        chosen = matches[0]
    if len(found) <= 1:
        return pairs, chosen, ()
    kept = [p for p in pairs if _electrode_of(p) is chosen]
    others = ", ".join(n for e, n in zip(found, names, strict=True) if e is not chosen)
    flag = S.PROTOCOL_ELECTRODE.make(float(len(found)), electrode=str(chosen.name),
                                     count=len(found), others=others)
    return kept, chosen, (flag,)


def _listing(names: list[str]) -> str:
    return ", ".join(f"{k}: {n}" for k, n in enumerate(names)) or "none"


def read_nwb_pynwb(path: str | Path, channel: int | str | None = None) -> Recording:
    """Read the current-clamp sweeps of an NWB 2 file through pynwb (any layout).

    Returns the same `Recording` and metadata as `read_nwb`; raises `LoadError` for a
    truncated, damaged or non-NWB HDF5 file, or one without current-clamp sweeps.
    """
    path = Path(path)
    from pynwb import NWBHDF5IO
    from pynwb.icephys import CurrentClampSeries, IZeroClampSeries

    current_clamp = (CurrentClampSeries,)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with NWBHDF5IO(str(path), mode="r", load_namespaces=True) as io:
                nwb = io.read()
                table = nwb.intracellular_recordings
                if table is not None and len(table) > 0:
                    pairs = _table_pairs(nwb, current_clamp)
                else:
                    pairs = _acquisition_pairs(nwb, current_clamp)
                pairs = [p for p in pairs if not isinstance(_cut(p[0])[0], IZeroClampSeries)]
                pairs, electrode, flags = _one_electrode(path, nwb, pairs, channel)
                others = _other_clamp(nwb)
                if not pairs and "voltage clamp" in others:
                    raise LoadError(
                        path,
                        "a voltage-clamp recording (VoltageClampSeries; no current-clamp sweeps "
                        "in this NWB file); passivefit needs current clamp with current steps",
                    )
                if not pairs:
                    raise LoadError(
                        path,
                        "no current-clamp sweeps in this NWB file (CurrentClampSeries); "
                        "passivefit analyses current clamp only",
                    )
                sweeps, rate, settings, left_out = _read_sweeps(path, pairs)
                flags = (*flags, *_other_clamp_flag(others), *left_out)
                metadata = _metadata(nwb, electrode)
                metadata.update(_settings_metadata(settings))
    except LoadError:
        raise
    except OSError as err:
        raise LoadError(
            path, f"unreadable HDF5 (truncated or damaged: {_reason(err)}); copy the file again"
        ) from None
    except Exception as err:  # hdmf/h5py raise many types on files that are not NWB
        raise LoadError(
            path, f"HDF5 but not a readable NWB file ({_reason(err)}); export it as NWB 2"
        ) from None
    recording = Recording(sweeps, rate, path=str(path), format="nwb", metadata=metadata,
                          flags=flags)
    return _finish(recording)


# ---------------------------------------------------------------- reading with h5py only

_DIRECT_NAMESPACES = frozenset({"core", "hdmf-common", "hdmf-experimental"})
_HDMF_NAMESPACES = frozenset({"hdmf-common", "hdmf-experimental"})
# the only core types that are CurrentClampSeries (IZeroClampSeries is skipped as in pynwb)
_RESPONSE_TYPE = "CurrentClampSeries"
_STIMULUS_TYPE = "CurrentClampStimulusSeries"
_ICEPHYS = "general/intracellular_ephys"
# ISO 8601 with seconds and a zone: read alike by datetime and by pynwb's date parser
_ISO_WITH_ZONE = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d{1,6})?(Z|[+-]\d\d:\d\d)")


class _Unfamiliar(Exception):
    """The file holds something the h5py reader does not handle; pynwb reads it."""


def _type_of(obj: Any) -> str:
    """neurodata_type of a core object; '' for an hdmf-common one (never a series)."""
    namespace = obj.attrs.get("namespace")
    if namespace == "core":
        return str(obj.attrs["neurodata_type"])
    if namespace in _HDMF_NAMESPACES:
        return ""
    raise _Unfamiliar(f"{obj.name}: namespace {namespace!r}")


def _text(group: Any, name: str) -> str | None:
    """A scalar text dataset as str (UTF-8, as pynwb decodes it), None when absent."""
    if name not in group:
        return None
    value = group[name][()]
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, str):
        return value
    raise _Unfamiliar(f"{group.name}/{name} is not text")


def _direct_samples(series: Any, unit: str, start: int, count: int | None) -> np.ndarray:
    """Samples in SI units exactly as `_si` computes them from pynwb's series."""
    data = series["data"]
    if data.ndim != 1 or data.attrs.get("unit") != unit:
        raise _Unfamiliar(f"{data.name}: shape {data.shape}, unit {data.attrs.get('unit')!r}")
    stop = None if count is None or count < 0 else start + count
    raw = np.array(data[start:stop], dtype=np.float64)
    offset = float(data.attrs.get("offset", 0.0) or 0.0)
    return raw * float(data.attrs.get("conversion", 1.0)) + offset


def _direct_rate(series: Any) -> float:
    rate = None if "timestamps" in series else series["starting_time"].attrs.get("rate")
    if rate is None:
        raise _Unfamiliar(f"{series.name}: no fixed rate")
    return whole_hz(float(rate))


def _references(table: Any, category: str, column: str) -> np.ndarray | None:
    """The (idx_start, count, timeseries) rows of one table column, None when absent."""
    group = table[category]
    listed = column in [str(name) for name in group.attrs.get("colnames", [])]
    if listed != (column in group):
        raise _Unfamiliar(f"{group.name}: column {column} stored and listed differ")
    if not listed:
        return None
    rows = group[column][()]
    if rows.dtype.names != ("idx_start", "count", "timeseries"):
        raise _Unfamiliar(f"{group.name}/{column}: fields {rows.dtype.names}")
    return rows


def _direct_table_pairs(f: Any, table: Any) -> tuple[list[tuple[tuple, tuple | None]], dict]:
    """((series, start, count), stimulus cut or None) per current-clamp table row, and the
    sweep numbers of the rows in other clamp modes (`_other_clamp`)."""
    responses = _references(table, "responses", "response")
    stimuli = _references(table, "stimuli", "stimulus")
    rows = len(table["id"])
    if responses is None or len(responses) != rows:
        raise _Unfamiliar("intracellular_recordings: response column missing or short")
    if stimuli is not None and len(stimuli) != rows:
        raise _Unfamiliar("intracellular_recordings: stimulus column of another length")
    pairs, others = [], {}
    for row, (start, count, reference) in enumerate(responses):
        if start < 0 or count < 0:
            continue  # no response in this row: pynwb gives None, which is no current clamp
        series = f[reference]
        kind = _type_of(series)
        if kind in _OTHER_CLAMP:
            others.setdefault(series.name, series)
        if kind != _RESPONSE_TYPE:
            continue
        stimulus = None
        if stimuli is not None and stimuli[row]["idx_start"] >= 0 and stimuli[row]["count"] >= 0:
            s_start, s_count, s_reference = stimuli[row]
            s_series = f[s_reference]
            if _type_of(s_series) != _STIMULUS_TYPE:
                raise _Unfamiliar(f"{s_series.name}: stimulus of another type")
            stimulus = (s_series, int(s_start), int(s_count))
        pairs.append(((series, int(start), int(count)), stimulus))
    return pairs, _direct_numbers_by_kind(others.values())


def _by_type(group: Any) -> dict[str, list]:
    """Members of `group` by core type (hard links under their own name)."""
    found: dict[str, list] = {}
    for name, obj in group.items():
        if obj.name.rsplit("/", 1)[-1] != name:
            raise _Unfamiliar(f"{group.name}/{name} links to {obj.name}")
        found.setdefault(_type_of(obj), []).append(obj)
    return found


def _direct_numbers_by_kind(series) -> dict[str, list]:
    """`_numbers_by_kind` of h5py series."""
    return _numbers_by_kind((_type_of(s), s.attrs.get("sweep_number")) for s in series)


def _direct_acquisition_pairs(f: Any) -> tuple[list[tuple[tuple, tuple | None]], dict]:
    """Responses in `acquisition` with the `stimulus` series of the same sweep number, and
    the sweep numbers of its other clamp modes (`_other_clamp`)."""
    acquired = _by_type(f["acquisition"])
    responses = acquired.get(_RESPONSE_TYPE, [])
    others = _direct_numbers_by_kind(s for kind in _OTHER_CLAMP for s in acquired.get(kind, []))
    stimuli: dict = {}
    for s in _by_type(f["stimulus/presentation"]).get(_STIMULUS_TYPE, []):
        number = s.attrs.get("sweep_number")
        if number is not None:
            if number in stimuli:
                raise _Unfamiliar(f"two stimuli of sweep {number}")
            stimuli[number] = s
    responses.sort(
        key=lambda s: (
            s.attrs.get("sweep_number") is None,
            s.attrs.get("sweep_number") or 0,
            s.name.rsplit("/", 1)[-1],
        )
    )
    pairs = []
    for r in responses:
        number = r.attrs.get("sweep_number")
        stimulus = stimuli.get(number) if number is not None else None
        pairs.append(((r, 0, None), None if stimulus is None else (stimulus, 0, None)))
    return pairs, others


def _direct_setting(series: Any, field: str) -> float | None:
    if field not in series:
        return None
    value = series[field][()]
    if np.ndim(value) != 0:
        raise _Unfamiliar(f"{series.name}/{field} is not a scalar")
    return float(value)


def _direct_sweeps(
    pairs: list[tuple[tuple, tuple | None]]
) -> tuple[list[Sweep], float, list[dict]]:
    sweeps, rates, settings = [], set(), []
    numbers = _sweep_numbers([series.attrs.get("sweep_number") for (series, _, _), _ in pairs])
    for k, ((series, start, count), stimulus) in zip(numbers, pairs, strict=True):
        settings.append({f: _direct_setting(series, f) for f in AMPLIFIER_SETTINGS})
        voltage = _direct_samples(series, "volts", start, count)
        rates.add(_direct_rate(series))
        current = None
        if stimulus is not None:
            current = _direct_samples(stimulus[0], "amperes", stimulus[1], stimulus[2])
        sweeps.append(Sweep(k, voltage, current))  # unequal lengths raise: pynwb words it
    if len(rates) != 1:
        raise _Unfamiliar(f"sampling rates {sorted(rates)}")   # pynwb's path keeps one
    return sweeps, rates.pop(), settings


def _direct_electrode(f: Any) -> Any:
    """The one IntracellularElectrode group, or None."""
    if _ICEPHYS not in f:
        return None
    members = [m for m in f[_ICEPHYS].values() if "neurodata_type" in m.attrs]  # not `filtering`
    electrodes = [m for m in members if _type_of(m) == "IntracellularElectrode"]
    if len(electrodes) > 1:
        raise _Unfamiliar("several electrodes")  # pynwb's order decides which one
    return electrodes[0] if electrodes else None


def _direct_date(f: Any) -> str:
    text = _text(f, "session_start_time")
    if text is None or not _ISO_WITH_ZONE.fullmatch(text):
        raise _Unfamiliar(f"session_start_time {text!r}")
    return dt.datetime.fromisoformat(text).isoformat()


def _direct_metadata(f: Any) -> dict:
    """The same keys and values as `_metadata` gives from pynwb's NWBFile."""
    identifier = _text(f, "identifier")
    description = _text(f, "session_description")
    if identifier is None or description is None:
        raise _Unfamiliar("required NWBFile field missing")
    general = f["general"]
    electrode = _direct_electrode(f)
    cell_id = _text(electrode, "cell_id") if electrode is not None else None
    metadata: dict = {
        "cell_id": cell_id or identifier,
        "identifier": identifier,
        "date": _direct_date(f),
    }
    notes = _text(general, "notes")
    texts = {
        "session_description": description,
        "lab": _text(general, "lab"),
        "institution": _text(general, "institution"),
        "electrode": _text(electrode, "description") if electrode is not None else None,
        "protocol": _text(general, "protocol"),
        "notes": notes,
    }
    if "subject" in general:
        subject = general["subject"]
        if _type_of(subject) != "Subject":
            raise _Unfamiliar(f"subject of type {subject.attrs.get('neurodata_type')!r}")
        texts.update(subject_id=_text(subject, "subject_id"), species=_text(subject, "species"))
    metadata.update({k: v for k, v in texts.items() if v})
    match = _TEMPERATURE.search(notes or "")
    if match:
        metadata["temperature_C"] = float(match["value"])
    filtering = _text(electrode, "filtering") if electrode is not None else None
    filter_hz = filter_hz_from_text(filtering)
    if filter_hz is not None:
        metadata["filter_hz"] = filter_hz
    return metadata


def _check_direct_file(f: Any) -> None:
    """An NWB 2 file whose cached schemas are only the core and hdmf ones."""
    attrs = f.attrs
    version = attrs.get("nwb_version")
    if (
        attrs.get("neurodata_type") != "NWBFile"
        or attrs.get("namespace") != "core"
        or not isinstance(version, str)
        or not version.startswith("2.")
    ):
        raise _Unfamiliar("not an NWB 2 file")
    extensions = set(f["specifications"]) - _DIRECT_NAMESPACES if "specifications" in f else set()
    if extensions:
        raise _Unfamiliar(f"extension namespaces {sorted(extensions)}")


def _read_direct(f: Any, path: Path) -> Recording:
    _check_direct_file(f)
    table_path = f"{_ICEPHYS}/intracellular_recordings"
    table = f[table_path] if table_path in f else None
    if table is not None and len(table["id"]) > 0:
        pairs, others = _direct_table_pairs(f, table)
    else:
        pairs, others = _direct_acquisition_pairs(f)
    if not pairs:
        raise _Unfamiliar("no current-clamp sweeps")  # pynwb words the error
    sweeps, rate, settings = _direct_sweeps(pairs)
    metadata = _direct_metadata(f)
    metadata.update(_settings_metadata(settings))
    return _finish(Recording(sweeps, rate, path=str(path), format="nwb", metadata=metadata,
                             flags=_other_clamp_flag(others)))


def read_nwb_hdf5(path: str | Path) -> Recording | None:
    """Read the common NWB 2 icephys layouts with h5py alone, as pynwb would read them.

    Handles current-clamp responses (CurrentClampSeries with a fixed `rate`) listed
    in the `intracellular_recordings` table, or in `acquisition` paired with
    `stimulus` CurrentClampStimulusSeries by `sweep_number`; samples are
    ``data * conversion + offset`` in V and A.

    Parameters
    ----------
    path : str or Path
        The .nwb (HDF5) file.

    Returns
    -------
    Recording or None
        The same recording and metadata as `read_nwb_pynwb`; None when the file holds
        anything else (extension types, timestamps, several electrodes, other units,
        naive dates, ...) or cannot be read, so that pynwb reads it or names the error.
    """
    import h5py

    path = Path(path)
    try:
        with h5py.File(path, "r") as f:
            return _read_direct(f, path)
    except Exception:  # unfamiliar or damaged: the pynwb path reads it or explains why
        return None


def read_nwb(path: str | Path, channel: int | str | None = None) -> Recording:
    """Read the current-clamp sweeps of an NWB 2 file.

    Tries `read_nwb_hdf5` (h5py only) and, when it declines, `read_nwb_pynwb`.

    Parameters
    ----------
    path : str or Path
        The .nwb (HDF5) file.

    Returns
    -------
    Recording
        One sweep per current-clamp response (V), with the paired stimulus (A) or
        None. Metadata: `cell_id`, `identifier`, `date` (ISO), `session_description`,
        `lab`, `institution`, `protocol`, `electrode`, `subject_id`, `species`, `notes`,
        `temperature_C` (from ``temperature_C: 32`` in the notes), `filter_hz`
        (the low-pass corner in Hz, from the electrode's `filtering` text; see
        `filter_hz_from_text`), and the responses' amplifier settings
        `bias_current_A`, `bridge_balance_ohm`, `capacitance_compensation_F` where
        present (one float, or a per-sweep list when they vary). `current_source`
        is "stimulus series" when every sweep has one, and `protocol` lists the
        steps found in them.

    Raises
    ------
    LoadError
        Not HDF5, truncated, HDF5 but not NWB, damaged, no current-clamp sweeps, or
        an unknown `channel`.

    Notes
    -----
    Sweeps of different electrodes are different cells and are never mixed: one
    electrode is read, the one named by `channel` (its name, or its index among the
    electrodes with current-clamp sweeps), by default the first; when there are
    others the recording carries a ``protocol.electrode_chosen`` flag naming them.
    Metadata (`cell_id`, `electrode`, `filter_hz`) come from that electrode.
    """
    path = Path(path)
    _check_signature(path)
    recording = read_nwb_hdf5(path) if channel is None else None
    return recording if recording is not None else read_nwb_pynwb(path, channel)


# ---------------------------------------------------------------- writing


def _start_time(metadata: dict) -> dt.datetime:
    raw = metadata.get("date")
    when = dt.datetime.fromisoformat(str(raw)) if raw else dt.datetime.now(dt.UTC)
    return when if when.tzinfo is not None else when.replace(tzinfo=dt.UTC)


def _notes(metadata: dict) -> str | None:
    notes = [str(metadata["notes"])] if metadata.get("notes") else []
    if metadata.get("temperature_C") is not None and not _TEMPERATURE.search(" ".join(notes)):
        notes.append(f"temperature_C: {float(metadata['temperature_C'])!r}")
    return "\n".join(notes) or None


def _compressed(values: np.ndarray) -> Any:
    from hdmf.backends.hdf5.h5_utils import H5DataIO

    return H5DataIO(values.astype(np.float32), compression="gzip", compression_opts=4, shuffle=True)


def _new_file(metadata: dict) -> Any:
    from pynwb import NWBFile
    from pynwb.file import Subject

    cell_id = metadata.get("cell_id")
    subject = None
    if metadata.get("subject_id") or metadata.get("species"):
        subject = Subject(subject_id=metadata.get("subject_id"), species=metadata.get("species"))
    return NWBFile(
        session_description=str(metadata.get("session_description") or "current-clamp steps"),
        identifier=str(metadata.get("identifier") or cell_id or uuid.uuid4().hex),
        session_start_time=_start_time(metadata),
        lab=metadata.get("lab"),
        institution=metadata.get("institution"),
        notes=_notes(metadata),
        protocol=str(metadata["protocol"]) if metadata.get("protocol") else None,
        subject=subject,
    )


def write_nwb(recording: Recording, path: str | Path) -> None:
    """Write a recording as an NWB 2 icephys file.

    Each sweep becomes a CurrentClampSeries (response, mV stored as float32 with
    conversion 1e-3) and, when it has a current, a CurrentClampStimulusSeries (pA
    stored as float32 with conversion 1e-12), both gzip-compressed and joined in the
    intracellular-recordings table; all sweeps form one sequential recording.
    Metadata written: `cell_id` (electrode cell id), `date` (session start; naive
    dates are taken as UTC), `lab`, `institution`, `session_description`,
    `protocol`, `electrode`, `subject_id`, `species`, `notes`, `temperature_C` (in
    the notes), `filter_hz` (in the electrode's `filtering` text, see
    `filtering_text`), `bias_current_A`, `bridge_balance_ohm`,
    `capacitance_compensation_F` (on each response series; a per-sweep list or one
    float). Other keys have no NWB field and are not written.

    Parameters
    ----------
    recording : Recording
        Sweeps in V and A.
    path : str or Path
        Target .nwb file (overwritten).

    Raises
    ------
    ValueError
        Metadata `filter_hz` that is not a positive number.
    """
    from pynwb import NWBHDF5IO
    from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

    metadata = recording.metadata
    filter_hz = metadata_filter_hz(metadata)
    nwb = _new_file(metadata)
    device = nwb.create_device(name="amplifier", description="current-clamp amplifier")
    electrode = nwb.create_icephys_electrode(
        name="electrode_0",
        description=str(metadata.get("electrode") or "whole-cell patch electrode"),
        device=device,
        cell_id=str(metadata["cell_id"]) if metadata.get("cell_id") else None,
        filtering=None if filter_hz is None else filtering_text(filter_hz),
    )
    rows = []
    for k, sweep in enumerate(recording.sweeps):
        number = np.uint32(k)
        response = CurrentClampSeries(
            name=f"response_{k:04d}",
            data=_compressed(sweep.voltage * _V_UNITS_PER_SI),
            electrode=electrode,
            gain=1.0,
            rate=float(recording.sample_rate_hz),
            conversion=1.0 / _V_UNITS_PER_SI,
            sweep_number=number,
            **{field: _setting_of(metadata, key, k) for field, key in AMPLIFIER_SETTINGS.items()},
        )
        stimulus = None
        if sweep.current is not None:
            stimulus = CurrentClampStimulusSeries(
                name=f"stimulus_{k:04d}",
                data=_compressed(sweep.current * _I_UNITS_PER_SI),
                electrode=electrode,
                gain=1.0,
                rate=float(recording.sample_rate_hz),
                conversion=1.0 / _I_UNITS_PER_SI,
                sweep_number=number,
            )
        rows.append(
            nwb.add_intracellular_recording(
                electrode=electrode, stimulus=stimulus, response=response
            )
        )
    simultaneous = [nwb.add_icephys_simultaneous_recording(recordings=[row]) for row in rows]
    nwb.add_icephys_sequential_recording(
        simultaneous_recordings=simultaneous, stimulus_type="current steps"
    )
    with NWBHDF5IO(str(path), mode="w") as io:
        io.write(nwb)
