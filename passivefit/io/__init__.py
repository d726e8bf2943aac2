"""Readers and writers: every supported file becomes one `Recording`.

`load(path)` picks a reader by the file's extension (or by its content when the
extension and the content disagree), records the file's sha256 and checks that the
data can be analysed. `save(recording, path)` picks a writer by extension.

Readers live in their own modules and are imported only when a file of their kind
is opened, so importing this package stays cheap.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from passivefit.io.recording import LoadError, Recording, StepSpec, Sweep, file_sha256

__all__ = [
    "READERS",
    "LoadError",
    "Reader",
    "Recording",
    "StepSpec",
    "Sweep",
    "file_sha256",
    "load",
    "save",
    "supported_extensions",
]

_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_ABF_SIGNATURES = (b"ABF ", b"ABF2")


@dataclass(frozen=True)
class Reader:
    """One file format: its name, extensions, content signature and reader.

    Parameters
    ----------
    name : str
        Format name recorded in `Recording.format`.
    extensions : tuple of str
        Lower-case file extensions, with the dot.
    module : str
        Module (under passivefit.io) holding the reader, imported on first use.
    function : str
        Name of the reader function ``f(path) -> Recording`` in `module`.
    signature : callable
        ``signature(head) -> bool``: whether the file's first bytes look like this
        format for certain (a binary magic number).
    """

    name: str
    extensions: tuple[str, ...]
    module: str
    function: str
    signature: Callable[[bytes], bool]

    def read(self, path: Path, **options: object) -> Recording:
        module = importlib.import_module(f"passivefit.io.{self.module}")
        reader: Callable[..., Recording] = getattr(module, self.function)
        return reader(path, **options)


READERS: tuple[Reader, ...] = (
    Reader("abf", (".abf",), "abf", "read_abf", lambda head: head[:4] in _ABF_SIGNATURES),
    Reader("nwb", (".nwb",), "nwb", "read_nwb", lambda head: head.startswith(_HDF5_SIGNATURE)),
    Reader("csv", (".csv", ".tsv", ".txt"), "text", "read_text", lambda head: False),
)


def supported_extensions() -> list[str]:
    """All extensions `load` accepts, e.g. ``[".abf", ".nwb", ".csv", ...]``."""
    return [ext for reader in READERS for ext in reader.extensions]


def _supported_text() -> str:
    return "passivefit reads " + ", ".join(supported_extensions())


def _choose_reader(path: Path, head: bytes) -> Reader:
    by_content = next((r for r in READERS if r.signature(head)), None)
    if by_content is not None:
        return by_content  # the bytes are certain; the extension may lie
    suffix = path.suffix.lower()
    by_extension = next((r for r in READERS if suffix in r.extensions), None)
    if by_extension is None:
        shown = suffix or "no extension"
        raise LoadError(path, f"unknown file type ({shown}); {_supported_text()}")
    return by_extension


def load(path: str | Path, channel: int | str | None = None) -> Recording:
    """Read a recording file of any supported format.

    Parameters
    ----------
    path : str or Path
        An .abf (ABF 1 or 2), .nwb (NWB 2 icephys) or .csv/.tsv/.txt
        (passivefit sweep table) file.
    channel : int or str, optional
        ABF files: the membrane-potential channel, by index among the file's input
        channels (from 0) or by name; by default the first mV channel that looks
        like a membrane potential. NWB files: the electrode, by name or by index
        among the electrodes with current-clamp sweeps; by default the first (sweeps
        of different electrodes are never mixed).

    Returns
    -------
    Recording
        Sweeps in SI units (V, A), with `path`, `sha256` and `format` filled in, and
        `current_source`, `flags`, `protocol` as the reader found them.

    Raises
    ------
    LoadError
        The file is missing, empty, of an unknown type, unreadable, or holds data
        that cannot be analysed (no sweeps, NaN, too short, flat, voltage clamp, a
        stimulus without a current step); the message is one line naming the
        problem and what to do.
    """
    path = Path(path)
    if not path.exists():
        raise LoadError(path, "no such file; check the path")
    if not path.is_file():
        raise LoadError(path, "this is a folder, not a recording file; give a file")
    with open(path, "rb") as f:
        head = f.read(16)
    if not head:
        raise LoadError(path, "the file is empty (0 bytes); re-export the recording")
    reader = _choose_reader(path, head)
    if channel is not None and reader.name not in ("abf", "nwb"):
        raise LoadError(path, f"`channel` applies to ABF and NWB files only; this is a "
                              f"{reader.name} file with one membrane-potential signal per sweep")
    recording = reader.read(path) if channel is None else reader.read(path, channel=channel)
    recording.path = str(path)
    recording.sha256 = file_sha256(path)
    recording.format = reader.name
    recording.validate()
    return recording


def save(recording: Recording, path: str | Path) -> Path:
    """Write a recording in the format given by the extension of `path`.

    Parameters
    ----------
    recording : Recording
        The recording to write (SI units).
    path : str or Path
        Target file: .nwb (NWB 2 icephys, keeps currents and metadata), .csv/.tsv
        (passivefit sweep table) or .abf (ABF 1, voltage only, int16).

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ValueError
        Unknown extension, or a recording the format cannot hold.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".nwb":
        from passivefit.io.nwb import write_nwb

        write_nwb(recording, path)
    elif suffix in (".csv", ".tsv"):
        from passivefit.io.text import write_csv

        write_csv(recording, path)
    elif suffix == ".abf":
        from passivefit.io.abf import write_abf1

        write_abf1(recording, path)
    else:
        shown = suffix or "no extension"
        raise ValueError(
            f"{path}: cannot write {shown} files; passivefit writes .nwb, .csv, .tsv, .abf"
        )
    return path
