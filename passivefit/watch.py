"""Watching an acquisition folder for recordings that have just been finished.

`FolderWatcher.poll()` is called over and over (by ``passivefit watch`` in a loop, by the
window from a QTimer); it never blocks and never starts a thread. A recording is
*complete* when

1. its size and modification time have not changed for `settle_s` seconds, and
2. it loads without error (``passivefit.io.load``).

A file still being written changes its size or time at every write, so it is never
read half-way while the writes are closer together than `settle_s`; a file that is
stable but not yet loadable (a writer that paused longer than `settle_s`, an HDF5 file
not yet closed) is tried again at every change and, after `give_up_s` of stable
failure, reported once as failed (and tried again if it changes later).

Only the folder itself is watched (not its sub-folders). Hidden files, passivefit's own
sheets and files with extensions the readers do not take are ignored. Files that are
already there when watching starts are ignored unless `include_existing` is given.
When several recordings become complete at once they are returned newest first (by
modification time).
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from passivefit.batch import is_own_csv
from passivefit.model import schema as S
from passivefit.model.errors import InputError

SETTLE_S = 1.0       # default: size and time unchanged this long before a file is read
GIVE_UP_S = 10.0     # default: a stable file that still fails to load is reported then
POLL_S = 0.25        # default pause between polls of the command


class WatchError(InputError):
    """A folder that cannot be watched (missing, not a folder, unreadable)."""


@dataclass(frozen=True)
class Finished:
    """A recording that is complete: loaded, ready to analyse.

    Attributes
    ----------
    path : Path
    recording : Recording
        What ``passivefit.io.load`` returned for it.
    mtime_s : float
        Its modification time (s since the epoch).
    """

    path: Path
    recording: object
    mtime_s: float


@dataclass(frozen=True)
class Unreadable:
    """A file that stayed unchanged for `give_up_s` but could not be loaded.

    Attributes
    ----------
    path : Path
    reason : str
        The reader's one-line reason.
    """

    path: Path
    reason: str


@dataclass
class _Seen:
    """What was last seen of one file (size, modification time) and since when (s)."""

    size: int
    mtime_ns: int
    since_s: float
    done: bool = False          # reported (finished or unreadable) at this size and time
    failure: str | None = None  # the last reason it did not load
    failed_since_s: float | None = None


def _default_loader(path: Path):
    from passivefit.io import load

    return load(path)


@dataclass
class FolderWatcher:
    """Poll a folder for finished recordings (see the module's description).

    Parameters
    ----------
    folder : str or Path
        The folder the acquisition program writes into.
    settle_s : float
        How long (s) a file's size and modification time must stay the same.
    include_existing : bool
        Also report the recordings already there when watching starts.
    give_up_s : float
        How long (s) a stable file may fail to load before it is reported unreadable.
    loader : callable, optional
        ``loader(path) -> Recording``, raising ``LoadError``; default ``passivefit.io.load``.
    clock : callable, optional
        Monotonic seconds; default ``time.monotonic`` (tests may pass their own).

    Raises
    ------
    WatchError
        When `folder` is not a readable folder.
    """

    folder: Path
    settle_s: float = SETTLE_S
    include_existing: bool = False
    give_up_s: float = GIVE_UP_S
    loader: Callable | None = None
    clock: Callable[[], float] = time.monotonic
    _seen: dict[Path, _Seen] = field(default_factory=dict, init=False, repr=False)

    def __post_init__(self) -> None:
        self.folder = Path(self.folder)
        if not (self.settle_s >= 0 and self.give_up_s >= 0):
            raise WatchError(f"the settle time must be 0 s or more, not {self.settle_s:g}")
        if not self.folder.exists():
            raise WatchError(f"{self.folder}: no such folder; give the folder the "
                             "acquisition program writes into")
        if not self.folder.is_dir():
            raise WatchError(f"{self.folder}: not a folder; give the folder the acquisition "
                             "program writes into")
        if not os.access(self.folder, os.R_OK | os.X_OK):
            raise WatchError(f"{self.folder}: cannot read the folder; check its permissions")
        if not self.include_existing:
            now = self.clock()
            for path, (size, mtime_ns) in self._listing().items():
                self._seen[path] = _Seen(size, mtime_ns, now, done=True)

    # ------------------------------------------------------------------ polling
    def poll(self) -> list[Finished | Unreadable]:
        """The files that became complete (or hopeless) since the last poll, newest first.

        Never raises for a single file; a folder that disappears raises `WatchError`.
        """
        now = self.clock()
        listing = self._listing()
        for gone in set(self._seen) - set(listing):
            del self._seen[gone]
        out: list[tuple[float, Finished | Unreadable]] = []
        for path, (size, mtime_ns) in listing.items():
            seen = self._seen.get(path)
            if seen is None or (seen.size, seen.mtime_ns) != (size, mtime_ns):
                self._seen[path] = _Seen(size, mtime_ns, now)  # new or still changing
                continue
            if seen.done or now - seen.since_s < self.settle_s:
                continue
            item = self._try(path, seen, now)
            if item is not None:
                out.append((mtime_ns * 1e-9, item))
        out.sort(key=lambda pair: pair[0], reverse=True)
        return [item for _, item in out]

    @property
    def pending(self) -> list[Path]:
        """Files seen but not yet reported (still being written, or not yet loadable)."""
        return sorted(p for p, s in self._seen.items() if not s.done)

    def _try(self, path: Path, seen: _Seen, now: float) -> Finished | Unreadable | None:
        from passivefit.model.errors import LoadError

        loader = self.loader or _default_loader
        try:
            recording = loader(path)
        except LoadError as exc:
            reason = exc.reason
        except Exception as exc:  # noqa: BLE001 - a reader's bug must not end the watch
            reason = f"could not be read ({type(exc).__name__}: {exc})"
        else:
            if self._stat(path) != (seen.size, seen.mtime_ns):
                return None   # written to while it was read: wait for it to settle again
            seen.done = True
            return Finished(path, recording, seen.mtime_ns * 1e-9)
        seen.failure = reason
        if seen.failed_since_s is None:
            seen.failed_since_s = now
        if now - seen.failed_since_s >= self.give_up_s:
            seen.done = True
            return Unreadable(path, reason)
        return None

    def _stat(self, path: Path) -> tuple[int, int] | None:
        try:
            st = path.stat()
        except OSError:
            return None
        return st.st_size, st.st_mtime_ns

    def _listing(self) -> dict[Path, tuple[int, int]]:
        """(size, mtime in ns) of every candidate recording in the folder."""
        from passivefit.io import supported_extensions

        extensions = set(supported_extensions())
        out: dict[Path, tuple[int, int]] = {}
        try:
            entries = list(os.scandir(self.folder))
        except OSError as exc:
            raise WatchError(f"{self.folder}: cannot read the folder any more "
                             f"({exc.strerror or exc})") from None
        for entry in entries:
            name = entry.name
            if name.startswith(".") or Path(name).suffix.lower() not in extensions:
                continue
            if name.endswith(("_sweeps.csv", "_sweeps.tsv")):
                continue
            try:
                if not entry.is_file():
                    continue
                st = entry.stat()
            except OSError:
                continue   # removed between the listing and the stat
            path = Path(entry.path)
            if path.suffix.lower() in (".csv", ".tsv") and st.st_size and is_own_csv(path):
                continue
            out[path] = (st.st_size, st.st_mtime_ns)
        return out


# ---------------------------------------------------------------------------- results
def summary_line(path: Path, data: dict) -> str:
    """One line per analysed cell: file, sweeps used, and the summary values with CIs."""
    cell = data.get("cell") or {}
    parts = [f"{Path(path).name}: {cell.get(S.N_SWEEPS_USED.key, 0)}/"
             f"{data.get('source', {}).get('sweep_count', '?')} sweeps"]
    for q in (S.TAU0, S.R_IN, S.TAU1, S.L_BS, S.RHO):
        value = cell.get(q.key)
        if value is None:
            continue
        text = f"{q.label} {value:.4g}"
        if q.ci and cell.get(q.ci) is not None:
            text += f" ± {cell[q.ci]:.2g}"
        parts.append(f"{text} {q.unit}".rstrip())
    errors = [f["code"] for f in data.get("flags", ())
              if getattr(S.FLAGS.get(f["code"]), "severity", "") == "error"]
    if errors:
        parts.append("errors: " + ", ".join(errors))
    return "; ".join(parts)


def file_result(database, recording, data: dict, settings) -> str:
    """Store one analysis in the cell database as ``batch`` does; "stored" or "skipped".

    The cell is the file's own cell id when it carries one (see ``Database.store``).
    """
    from passivefit.model.schema import METADATA_KEYS

    metadata = {k: recording.metadata[k] for k in METADATA_KEYS
                if isinstance(recording.metadata.get(k), str | int | float)}
    file_cell_id = metadata.pop(S.CELL_ID.key, None)
    outcome = database.store(data, cell_metadata=metadata, settings_hash=settings.settings_hash(),
                             file_cell_id=None if file_cell_id is None else str(file_cell_id))
    return outcome.status
