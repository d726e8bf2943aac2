"""NWB 2 intracellular electrophysiology (icephys) files, read and written with pynwb.

Reading takes the current-clamp sweeps of the `intracellular_recordings` table, or,
in files without that table, pairs `acquisition` responses with `stimulus` series by
sweep number. Writing fills the icephys tables (electrode, one stimulus and one
response series per sweep, intracellular recordings, simultaneous and sequential
recordings) so other NWB tools see a complete file.

pynwb is imported only when an NWB file is opened or written.
"""

from __future__ import annotations

import datetime as dt
import re
import uuid
import warnings
from pathlib import Path
from typing import Any

import numpy as np

from passivefit.io._rate import rate_from_times, whole_hz
from passivefit.io.recording import LoadError, Recording, Sweep

_TEMPERATURE = re.compile(
    r"temperature(?:_C)?\s*[:=]\s*(?P<value>[-+]?\d+(?:\.\d*)?)", re.IGNORECASE
)
_V_UNITS_PER_SI = 1e3  # responses stored in mV (float32), conversion 1e-3 to V
_I_UNITS_PER_SI = 1e12  # stimuli stored in pA (float32), conversion 1e-12 to A


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


def _cut(item: Any) -> tuple[Any, int, int | None]:
    """(series, start, count) of a table reference or of a whole series."""
    if hasattr(item, "timeseries"):
        return item.timeseries, int(item.idx_start), int(item.count)
    return item, 0, None


def _read_sweeps(path: Path, pairs: list[tuple[Any, Any]]) -> tuple[list[Sweep], float]:
    sweeps, rates = [], set()
    for k, (response, stimulus) in enumerate(pairs):
        series, start, count = _cut(response)
        voltage = _si(series, start, count)
        rates.add(_series_rate(series))
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
    if len(rates) > 1:
        raise LoadError(
            path, f"sweeps have different sampling rates {sorted(rates)} Hz; split the file"
        )
    return sweeps, rates.pop() if rates else float("nan")


def _electrode(nwb: Any) -> Any:
    electrodes = getattr(nwb, "icephys_electrodes", None) or {}
    return next(iter(electrodes.values()), None)


def _metadata(nwb: Any) -> dict:
    metadata: dict = {}
    electrode = _electrode(nwb)
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


def read_nwb(path: str | Path) -> Recording:
    """Read the current-clamp sweeps of an NWB 2 file.

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
        `temperature_C` (from ``temperature_C: 32`` in the notes).

    Raises
    ------
    LoadError
        Not HDF5, truncated, HDF5 but not NWB, damaged, or no current-clamp sweeps.
    """
    path = Path(path)
    _check_signature(path)
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
                if not pairs:
                    raise LoadError(
                        path,
                        "no current-clamp sweeps in this NWB file (CurrentClampSeries); "
                        "passivefit analyses current clamp only",
                    )
                sweeps, rate = _read_sweeps(path, pairs)
                metadata = _metadata(nwb)
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
    return Recording(sweeps, rate, path=str(path), format="nwb", metadata=metadata)


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
    the notes). Other keys have no NWB field and are not written.

    Parameters
    ----------
    recording : Recording
        Sweeps in V and A.
    path : str or Path
        Target .nwb file (overwritten).
    """
    from pynwb import NWBHDF5IO
    from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

    metadata = recording.metadata
    nwb = _new_file(metadata)
    device = nwb.create_device(name="amplifier", description="current-clamp amplifier")
    electrode = nwb.create_icephys_electrode(
        name="electrode_0",
        description=str(metadata.get("electrode") or "whole-cell patch electrode"),
        device=device,
        cell_id=str(metadata["cell_id"]) if metadata.get("cell_id") else None,
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
