"""The review of one recording, free of Qt: settings, current sweep, result, undo, saving.

Widgets edit a :class:`ReviewState` through its methods and redraw when it emits an
:class:`Event`; the state re-runs the core (`analyze_sweep` for the sweep on screen at
once, `analyze` for the cell, which a window runs off its UI thread). Nothing here
imports Qt, so the same review logic runs in tests and scripts without a display.

The review a person makes (windows, accept/reject decisions, settings) is kept in a
small JSON file of our own beside the recording, ``<recording>.passivefit-review.json``::

    {"format": "passivefit-review", "version": 1, "passivefit_version": "...",
     "recording": {"file": "cell.nwb", "sha256": "..."}, "saved_at": "2026-11-03T...Z",
     "current_sweep": 4, "settings": {... Settings.to_dict() ...}}

It is written to a temporary file and renamed over the old one, so a crash never
leaves half a review.
"""

from __future__ import annotations

import errno
import json
import math
import os
import tempfile
from dataclasses import dataclass, fields, replace
from datetime import UTC, datetime
from pathlib import Path

from passivefit import __version__
from passivefit.analysis import (
    RecordingResult,
    Settings,
    SweepFit,
    Windows,
    analyze,
    analyze_sweep,
    sweep_steps,
)
from passivefit.analysis.start import StartValues, start_values
from passivefit.analysis.sweep import with_bridge_removed
from passivefit.io.recording import LoadError, Recording

REVIEW_FORMAT = "passivefit-review"
REVIEW_VERSION = 1
REVIEW_SUFFIX = ".passivefit-review.json"
WINDOW_NAMES = ("baseline", "steady", "fit")
MAX_UNDO = 200
RATE_RANGE_HZ = (100.0, 100e6)   # sample rates the window can draw and fit (100 Hz–100 MHz)
WINDOW_DECIMALS = 3   # windows are kept to 1 µs (in ms), a drag gives no more


class ReviewFileError(ValueError):
    """A review file cannot be used; the message says why and what happens instead."""


class Event:
    """A list of plain callbacks: ``connect(fn)``, ``disconnect(fn)``, ``emit(*args)``."""

    def __init__(self) -> None:
        self._callbacks: list = []

    def connect(self, callback) -> None:
        self._callbacks.append(callback)

    def disconnect(self, callback) -> None:
        self._callbacks.remove(callback)

    def emit(self, *args) -> None:
        for callback in list(self._callbacks):
            callback(*args)


# ----------------------------------------------------------------------------- files
def expand_paths(paths) -> list[Path]:
    """Files as given; folders replaced by the recordings in them (sorted by name)."""
    from passivefit.io import supported_extensions

    extensions = set(supported_extensions())
    files: list[Path] = []
    for path in (Path(p) for p in paths):
        if path.is_dir():
            files.extend(sorted(p for p in path.iterdir() if p.is_file()
                                and p.suffix.lower() in extensions
                                and not p.name.endswith(("_sweeps.csv", "_sweeps.tsv"))))
        else:
            files.append(path)
    return files


# ----------------------------------------------------------------------------- review file
def review_path(recording_path: str | os.PathLike, sha256: str = "") -> Path:
    """Where the review of a recording is kept.

    Beside the recording when its folder is writable and is not the bundled sample
    folder; otherwise in the user's state folder
    (``$XDG_STATE_HOME/passivefit/reviews``), named after the file and its hash.
    """
    path = Path(recording_path).resolve()
    beside = path.with_name(path.name + REVIEW_SUFFIX)
    if os.access(path.parent, os.W_OK) and not _is_sample_folder(path.parent):
        return beside
    state = Path(os.environ.get("XDG_STATE_HOME", Path.home() / ".local" / "state"))
    name = f"{path.name}.{sha256[:12] or 'nohash'}{REVIEW_SUFFIX}"
    return state / "passivefit" / "reviews" / name


def _is_sample_folder(folder: Path) -> bool:
    from passivefit.samples import REPO_SAMPLES

    return folder == REPO_SAMPLES.resolve()


def review_document(recording: Recording, settings: Settings, current_sweep: int) -> dict:
    """The JSON object of a review file."""
    return {
        "format": REVIEW_FORMAT,
        "version": REVIEW_VERSION,
        "passivefit_version": __version__,
        "recording": {"file": Path(recording.path).name, "sha256": recording.sha256},
        "saved_at": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "current_sweep": int(current_sweep),
        "settings": settings.to_dict(),
    }


def write_review(path: str | os.PathLike, document: dict) -> Path:
    """Write a review file atomically (temporary file in the same folder, then rename)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            json.dump(document, f, indent=2)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def read_review(path: str | os.PathLike, sha256: str = "") -> tuple[Settings, int]:
    """The settings and current sweep (a sweep number) of a review file.

    Raises
    ------
    ReviewFileError
        Not JSON, not a review, a newer version, keys missing or of the wrong type, or
        made for a different recording (another sha256).
    """
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError, RecursionError) as exc:
        raise ReviewFileError(f"{path}: not a readable review file ({_short(exc)})") from None
    if not isinstance(doc, dict) or doc.get("format") != REVIEW_FORMAT:
        raise ReviewFileError(f"{path}: not a {REVIEW_FORMAT} file")
    version = doc.get("version")
    if not _is_int(version) or version < 1:
        raise ReviewFileError(f"{path}: review version {version!r} is not one this "
                              f"passivefit reads ({REVIEW_VERSION})")
    if version > REVIEW_VERSION:
        raise ReviewFileError(f"{path}: review version {version!r} is newer than this "
                              f"passivefit reads ({REVIEW_VERSION}); update passivefit to use it")
    problem = _document_problem(doc)
    if problem:
        raise ReviewFileError(f"{path}: the review is damaged ({problem})")
    saved_sha = doc["recording"].get("sha256") or ""
    if sha256 and saved_sha and saved_sha != sha256:
        raise ReviewFileError(f"{path}: the review was made for a different version of the "
                              "recording (sha256 differs)")
    try:
        settings = Settings.from_dict(doc["settings"])
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise ReviewFileError(f"{path}: the saved settings are damaged ({_short(exc)})") \
            from None
    return settings, int(doc.get("current_sweep") or 0)


def _short(exc: BaseException) -> str:
    return str(exc).splitlines()[0][:160] if str(exc) else type(exc).__name__


def _is_int(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _is_number(x) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x)


def _span_problem(name: str, span) -> str:
    if span is None:
        return ""
    if not (isinstance(span, list) and len(span) == 2 and all(map(_is_number, span))):
        return f"`{name}` must be two numbers (ms), not {span!r}"
    return ""


def _windows_problem(where: str, w) -> str:
    if not isinstance(w, dict):
        return f"`{where}` must be an object, not {w!r}"
    kinds = {f.name: str(f.type) for f in fields(Windows)}
    for key, value in w.items():
        kind = kinds.get(key)
        if kind is None:
            return f"`{where}` has an unknown key `{key}`"
        if kind == "tuple[float, float] | None":
            problem = _span_problem(f"{where}.{key}", value)
        elif not _TYPE_CHECKS.get(kind, lambda v: True)(value):
            problem = f"`{where}.{key}` has the wrong type ({value!r})"
        else:
            problem = ""
        if problem:
            return problem
    return ""


_TYPE_CHECKS = {   # a Settings field's annotation -> what its JSON value must be
    "tuple[int, ...] | None": lambda v: v is None or (isinstance(v, list)
                                                      and all(map(_is_int, v))),
    "StepSpec | None": lambda v: v is None or (isinstance(v, dict) and all(
        _is_number(x) for x in v.values())),
    "float | None": lambda v: v is None or _is_number(v),
    "str": lambda v: isinstance(v, str),
    "str | None": lambda v: v is None or isinstance(v, str),
    "bool": lambda v: isinstance(v, bool),
    "bool | None": lambda v: v is None or isinstance(v, bool),
    "int": _is_int,
    "tuple[tuple[int, Windows], ...]": lambda v: isinstance(v, list) and all(
        isinstance(x, list) and len(x) == 2 and _is_int(x[0]) for x in v),
    "tuple[tuple[int, bool, str], ...]": lambda v: isinstance(v, list) and all(
        isinstance(x, list) and len(x) == 3 and _is_int(x[0]) and isinstance(x[1], bool)
        and isinstance(x[2], str) for x in v),
}


def _document_problem(doc: dict) -> str:
    """What is wrong with the types of a review document ("" when nothing).

    Checked on the JSON itself, before `Settings.from_dict` turns values into other
    types (it would read a decision ``"false"`` as accepted).
    """
    recording = doc.get("recording", {})
    if not isinstance(recording, dict) or not all(
            isinstance(recording.get(k, ""), str) for k in ("file", "sha256")):
        return f"`recording` must hold the file name and sha256 as text, not {recording!r}"
    current = doc.get("current_sweep", 0)
    if current is not None and not _is_int(current):
        return f"`current_sweep` must be a whole number, not {current!r}"
    settings = doc.get("settings")
    if not isinstance(settings, dict):
        return "`settings` is missing" if settings is None else \
            f"`settings` must be an object, not {settings!r}"
    checks = {f.name: _TYPE_CHECKS.get(str(f.type), lambda v: True) for f in fields(Settings)}
    for key, value in settings.items():
        check = checks.get(key)
        if check is None:
            return f"`settings` has an unknown key `{key}`"
        if not check(value):
            return f"`settings.{key}` has the wrong type ({value!r})"[:200]
    problem = _windows_problem("settings.windows", settings.get("windows") or {})
    for index, windows in settings.get("sweep_windows") or []:
        problem = problem or _windows_problem(f"settings.sweep_windows[{index}]", windows)
    return problem


def set_aside(path: str | os.PathLike) -> Path:
    """Rename a review file that cannot be used to ``<name>.bak`` (``.bak-2``, ``.bak-3``
    … when that exists), so nothing overwrites it; returns the new path.

    Raises OSError when it cannot be renamed (then it must not be written over either).
    """
    path = Path(path)
    backup = path.with_name(path.name + ".bak")
    n = 1
    while backup.exists() or backup.is_symlink():
        n += 1
        backup = path.with_name(f"{path.name}.bak-{n}")
    try:
        os.link(path, backup)          # the bytes never leave the disk, no half copy
    except (OSError, AttributeError):
        _copy_exact(path, backup)
    path.unlink()
    return backup


def _copy_exact(source: Path, target: Path) -> None:
    """Copy the bytes of `source` to a new file `target` (never over an existing one)."""
    data = source.read_bytes()
    with open(target, "xb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())


def check_recording(recording: Recording) -> None:
    """Refuse a recording whose header values the review cannot use (ValueError, one line).

    A sample rate outside `RATE_RANGE_HZ` (1e300 from a damaged header, or 0.001) gives
    sweeps of 1e-297 s or hours; the plots and the windows cannot show them.
    """
    fs = recording.sample_rate_hz
    low, high = RATE_RANGE_HZ
    if not (isinstance(fs, int | float) and math.isfinite(fs) and low <= fs <= high):
        shown = f"{fs:g}" if isinstance(fs, int | float) else repr(fs)
        raise ValueError(f"{recording.path}: the sample rate `{shown}` Hz is outside what the "
                         f"review window can show ({low:g} Hz to {high / 1e6:g} MHz); check "
                         "the file's header")


# ----------------------------------------------------------------------------- windows
def result_key(name: str, kind: str) -> str:
    """The `SweepFit.windows_s` key a window edits: the fit of a brief pulse is its decay."""
    return "fit_off" if name == "fit" and kind == "pulse" else name


def with_window(windows: Windows, name: str, span_ms: tuple[float, float] | None) -> Windows:
    """`windows` with one window (``baseline``, ``steady`` or ``fit``) set, or None = automatic."""
    if name not in WINDOW_NAMES:
        raise ValueError(f"unknown window {name!r}; use one of {', '.join(WINDOW_NAMES)}")
    if span_ms is not None:
        start, end = (round(float(x), WINDOW_DECIMALS) for x in span_ms)
        if not end > start:
            raise ValueError(f"the {name} window must end after it starts ({start:g} to "
                             f"{end:g} ms)")
        span_ms = (start, end)
    return replace(windows, **{f"{name}_ms": span_ms})


@dataclass(frozen=True)
class SweepStatus:
    """What the sweep table shows about one sweep's fate."""

    accepted: bool
    reason: str
    by_hand: bool


# ----------------------------------------------------------------------------- the state
class ReviewState:
    """One recording under review.

    Parameters
    ----------
    recording : Recording
    settings : Settings, optional
        Starting settings (a saved review, when `restore` finds one, replaces them).
    review_file : path-like or None, optional
        Where to keep the review; default :func:`review_path` of the recording.
    restore : bool
        Read the review file when it exists.
    autosave : bool
        Write the review file after every change.

    Events
    ------
    current_changed(index)       the sweep on screen changed
    sweep_refitted(SweepFit)     a live single-sweep fit is ready
    settings_changed(Settings)   windows or decisions changed (undo, redo included)
    analysis_needed(Settings)    the cell must be re-analysed with these settings
    result_changed(RecordingResult)
    saved(Path)
    save_failed(str)             the review file could not be written (the message says why)
    """

    def __init__(self, recording: Recording, settings: Settings | None = None, *,
                 review_file: str | os.PathLike | None = None, restore: bool = True,
                 autosave: bool = True) -> None:
        self.recording = recording
        self.fs = recording.sample_rate_hz
        self.review_file = Path(review_file) if review_file else review_path(
            recording.path, recording.sha256)
        self.autosave = autosave
        self.restore_note = ""
        self.restored = False
        self.backup: Path | None = None
        self.save_error = ""
        self._blocked = ""        # why the review file must not be written over
        check_recording(recording)
        settings = settings or Settings()
        saved = None
        if restore and (self.review_file.exists() or self.review_file.is_symlink()):
            try:
                saved_settings, saved_sweep = read_review(self.review_file, recording.sha256)
                saved = self._layout(saved_settings)
            except ReviewFileError as exc:
                self._keep_aside(str(exc))
            except (LoadError, ValueError) as exc:
                self._keep_aside(f"{self.review_file}: the saved settings do not fit this "
                                 f"recording ({_short(exc)})")
        if saved is not None:
            settings, (self.steps, self.indices) = saved_settings, saved
            self.restored = True
            position = self.indices.index(saved_sweep) if saved_sweep in self.indices else 0
        else:
            self.steps, self.indices = self._layout(settings)
            position = 0
        self.settings = settings
        self._voltage = {s.index: s.voltage for s in recording.sweeps}
        self._floor: dict[int, float] = {}
        # the live refit: what the newest analysis started its sweep fits from, the work
        # per sweep that the fit and steady windows do not change, and the bridge (Ω) the
        # analysis took out of each sweep's R_in
        self._starts: dict[Settings, StartValues] = {}
        self._start: StartValues | None = None
        self._prep: dict[int, dict] = {}
        self._removed: dict[int, float] = {}
        self.position = min(max(position, 0), len(self.indices) - 1)
        self.result: RecordingResult | None = None
        self.live: dict[int, SweepFit] = {}
        self._undo: list[Settings] = []
        self._redo: list[Settings] = []
        self.current_changed = Event()
        self.sweep_refitted = Event()
        self.settings_changed = Event()
        self.analysis_needed = Event()
        self.result_changed = Event()
        self.saved = Event()
        self.save_failed = Event()
        self.refit_failed = Event()

    def _layout(self, settings: Settings) -> tuple[dict, list[int]]:
        """The steps and the sweep numbers under review with `settings` (LoadError or
        ValueError when they cannot be used with this recording)."""
        recording = self.recording
        steps = dict(zip((s.index for s in recording.sweeps),
                         sweep_steps(recording, settings), strict=True))
        indices = [s.index for s in recording.sweeps
                   if settings.sweeps is None or s.index in settings.sweeps]
        if not indices:
            raise ValueError(f"none of the sweeps {list(settings.sweeps or ())} exist in "
                             f"{recording.path}")
        return steps, indices

    def _keep_aside(self, problem: str) -> None:
        """A review file that cannot be used: renamed to .bak before anything replaces it."""
        try:
            self.backup = set_aside(self.review_file)
        except OSError as exc:
            self._blocked = (f"it could not be kept aside ({exc.strerror or exc}), so it "
                             "is not written over")
            self.restore_note = (f"{problem}; {self._blocked}: this recording opened with a "
                                 "fresh review; File › Save review as… keeps it elsewhere")
            return
        self.restore_note = (f"{problem}; it was kept as {self.backup.name} and this recording "
                             "opened with a fresh review")

    @classmethod
    def open(cls, path: str | os.PathLike, settings: Settings | None = None,
             **kwargs) -> ReviewState:
        """Load a recording (LoadError when it cannot be read) and restore its review."""
        from passivefit.io import load

        return cls(load(path), settings, **kwargs)

    # ------------------------------------------------------------------ reading
    @property
    def current(self) -> int:
        """Index of the sweep on screen."""
        return self.indices[self.position]

    def voltage(self, index: int):
        """Voltage of sweep `index`, in V."""
        return self._voltage[index]

    def analysed_voltage(self, index: int):
        """Voltage of sweep `index` as the analysis fitted it (its mains hum taken out),
        in V; the recorded one before the analysis."""
        start = self._start
        return self._voltage[index] if start is None else start.voltages.get(
            index, self._voltage[index])

    def sweep_fit(self, index: int | None = None) -> SweepFit | None:
        """The newest fit of a sweep: a live refit if there is one, else the analysis's."""
        index = self.current if index is None else index
        if index in self.live:
            return self.live[index]
        if self.result is not None:
            return next((f for f in self.result.sweeps if f.index == index), None)
        return None

    def status(self, index: int) -> SweepStatus | None:
        """Accepted or not and why; a person's decision shows before the re-analysis ends."""
        decision = self.settings.decision_for(index)
        if decision is not None:
            accepted, reason = decision
            return SweepStatus(accepted, "" if accepted else (reason or "rejected by hand"), True)
        fit = self.result_sweep(index)
        if fit is None:
            return None
        return SweepStatus(fit.accepted, fit.reject_reason or "", False)

    def result_sweep(self, index: int) -> SweepFit | None:
        if self.result is None:
            return None
        return next((f for f in self.result.sweeps if f.index == index), None)

    def window_ms(self, name: str, index: int | None = None) -> tuple[float, float] | None:
        """A window of a sweep as used by its newest fit, in ms from the step onset."""
        index = self.current if index is None else index
        fit, step = self.sweep_fit(index), self.steps.get(index)
        if fit is None or step is None:
            return None
        span = fit.windows_s.get(result_key(name, step.kind))
        if span is None:
            return None
        return ((span[0] - step.onset_s) * 1e3, (span[1] - step.onset_s) * 1e3)

    def fit_start_floor_ms(self, index: int | None = None) -> float:
        """The earliest fit start of a sweep, in ms from its step onset: the end of the
        electrode/filter artefact after the fitted edge (the fit window stops there)."""
        index = self.current if index is None else index
        if index not in self._floor:
            from passivefit.analysis.windows import artefact_end_s
            from passivefit.core import steady

            step, v = self.steps.get(index), self._voltage[index]
            if step is None:
                return 0.0
            edge = step.onset if step.kind == "step" else step.offset
            before = v[max(0, step.onset - int(0.1 * self.fs)): step.onset]
            noise = steady.noise_sd(before) if before.size > 10 else 0.0
            after_s = artefact_end_s(v, edge, self.fs, noise)
            self._floor[index] = ((edge - step.onset) / self.fs + after_s) * 1e3
        return self._floor[index]

    def has_own_windows(self, index: int | None = None) -> bool:
        index = self.current if index is None else index
        return index in dict(self.settings.sweep_windows)

    @property
    def up_to_date(self) -> bool:
        """True when the cell result belongs to the current settings."""
        return self.result is not None and self.result.settings == self.settings

    @property
    def can_undo(self) -> bool:
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        return bool(self._redo)

    # ------------------------------------------------------------------ navigation
    def go_to(self, index: int) -> None:
        """Show sweep `index` (a sweep number, not a position)."""
        if index not in self.indices:
            raise ValueError(f"sweep {index} is not in this review "
                             f"(sweeps {self.indices[0]}-{self.indices[-1]})")
        if index != self.current:
            self.position = self.indices.index(index)
            self.current_changed.emit(self.current)

    def step_sweep(self, delta: int) -> None:
        """Move `delta` sweeps forward (negative: back), stopping at the ends."""
        position = min(max(self.position + delta, 0), len(self.indices) - 1)
        if position != self.position:
            self.position = position
            self.current_changed.emit(self.current)

    # ------------------------------------------------------------------ fitting
    def refit_sweep(self, index: int | None = None, settings: Settings | None = None) -> SweepFit:
        """Fit one sweep now with `settings` (default: the current ones) and show it.

        Once the cell has been analysed, the sweep is fitted as the analysis fitted it: read
        up to its next step, with the analysis's fit start and sag window, its spontaneous
        events cut out, its start values, and the bridge the analysis found taken out of
        R_in; with the analysis's own settings the values are the analysis's. While a
        window moves, each fit starts from the sweep's newest one, and the baseline, noise,
        drift, artefact and sag are measured once (they do not depend on the fit window).
        """
        index = self.current if index is None else index
        asked = settings or self.settings
        step = self.steps[index]
        start = self._start
        v = self.analysed_voltage(index)
        if step is not None:
            v = v[:step.region_end]
        if start is None:
            fit = analyze_sweep(v, step, index, self.fs, asked,
                                cache=self._prep.setdefault(index, {}))
        else:
            effective = start.effective_for(asked)
            done = self.result_sweep(index)
            masked = done.masked_s if done is not None else ()
            fit = analyze_sweep(v, step, index, self.fs, effective,
                                self._start_taus(index, effective), masked,
                                cache=self._prep.setdefault(index, {}))
            removed = self._bridge_removed(index, v, masked)
            if removed:
                fit = with_bridge_removed(fit, removed)
        self.live[index] = fit
        self.sweep_refitted.emit(fit)
        return fit

    def _start_taus(self, index: int, effective: Settings) -> tuple[float, ...] | None:
        """Start values of a sweep's live fit: the analysis's own with its settings (so the
        values are the same), else the sweep's newest fit when it has as many components."""
        tau_init = self._start.tau_init
        if tau_init is None or effective == self._start.effective:
            return tau_init
        newest = self.sweep_fit(index)
        full = getattr(getattr(newest, "fit", None), "full", None)
        if full is not None and full.taus.size == min(len(tau_init), 2):
            return tuple(float(t) for t in full.taus)
        return tau_init

    def _bridge_removed(self, index: int, v, masked) -> float:
        """The bridge (Ω) the analysis took out of a sweep's deflection and R_in: the
        difference between the sweep fitted with the analysis's settings and its result."""
        if index not in self._removed:
            done, removed = self.result_sweep(index), 0.0
            if done is not None and done.dv_ss_V is not None and done.step is not None:
                raw = analyze_sweep(v, done.step, index, self.fs, self._start.effective,
                                    self._start.tau_init, masked,
                                    cache=self._prep.setdefault(index, {}))
                if raw.dv_ss_V is not None:
                    removed = (raw.dv_ss_V - done.dv_ss_V) / done.step.amplitude_A
            self._removed[index] = removed
        return self._removed[index]

    def preview_window(self, name: str, span_ms: tuple[float, float], *,
                       this_sweep_only: bool = False) -> SweepFit:
        """Refit the sweep on screen with a window moved, without keeping the change.

        For live feedback while a window is dragged; :meth:`set_window` keeps it.
        """
        return self.refit_sweep(settings=self._window_settings(name, span_ms, this_sweep_only))

    def set_window(self, name: str, span_ms: tuple[float, float] | None, *,
                   this_sweep_only: bool = False) -> None:
        """Keep a window (ms from the step onset; None = automatic) and re-analyse.

        With `this_sweep_only` the window applies to the sweep on screen only;
        otherwise to every sweep (and the sweep on screen loses its own setting of it).
        """
        self._change(self._window_settings(name, span_ms, this_sweep_only))

    def reset_windows(self) -> None:
        """Every window back to automatic, for every sweep."""
        self._change(replace(self.settings, windows=Windows(), sweep_windows=()))

    def _window_settings(self, name: str, span_ms, this_sweep_only: bool) -> Settings:
        s, index = self.settings, self.current
        if name == "fit" and span_ms is not None:
            # never before the artefact's end: a fit from 0 ms fits the artefact
            span_ms = (max(float(span_ms[0]), round(self.fit_start_floor_ms(), WINDOW_DECIMALS)),
                       float(span_ms[1]))
        own = dict(s.sweep_windows).get(index)
        if this_sweep_only:
            return s.with_sweep_windows(index, with_window(own or Windows(), name, span_ms))
        s = replace(s, windows=with_window(s.windows, name, span_ms))
        if own is not None:
            rest = with_window(own, name, None)
            s = s.with_sweep_windows(index, None if rest == Windows() else rest)
        return s

    def set_decision(self, index: int | None, accepted: bool | None, reason: str = "") -> None:
        """Accept (True) or reject (False, with a reason) a sweep; None = automatic tests."""
        index = self.current if index is None else index
        self._change(self.settings.with_decision(index, accepted, reason))

    def run_analysis(self) -> RecordingResult:
        """Analyse the cell now, in this thread, and keep the result."""
        result = self.compute(self.settings)
        self.accept_result(result)
        return result

    def compute(self, settings: Settings) -> RecordingResult:
        """The full analysis with `settings` (safe to call from a worker thread), and where
        its sweep fits started, kept for the live refits."""
        result = analyze(self.recording, settings)
        self._starts[settings] = start_values(self.recording, settings)
        return result

    def accept_result(self, result: RecordingResult) -> bool:
        """Keep a finished analysis unless the settings changed meanwhile (then False)."""
        if result.settings != self.settings:
            return False
        self.result = result
        self._start = self._starts.pop(result.settings, None)
        self._starts.clear()
        self._removed.clear()
        self.live.clear()
        self.result_changed.emit(result)
        return True

    # ------------------------------------------------------------------ undo
    def undo(self) -> bool:
        if not self._undo:
            return False
        self._redo.append(self.settings)
        self._apply(self._undo.pop())
        return True

    def redo(self) -> bool:
        if not self._redo:
            return False
        self._undo.append(self.settings)
        self._apply(self._redo.pop())
        return True

    def _change(self, settings: Settings) -> None:
        if settings == self.settings:
            return
        self._undo = [*self._undo[-(MAX_UNDO - 1):], self.settings]
        self._redo.clear()
        self._apply(settings)

    def _apply(self, settings: Settings) -> None:
        if settings.step != self.settings.step:
            self.steps = self._steps_for(settings)
            self._floor.clear()
            self._prep.clear()
            self._start = None           # the analysis's steps are not these
        self.settings = settings
        self.live.clear()
        if self.autosave:
            self.try_save()          # first: a refit that fails must not cost the decision
        self.settings_changed.emit(settings)
        if self.steps.get(self.current) is not None:
            try:
                self.refit_sweep()
            except Exception as exc:  # noqa: BLE001 - the review goes on; said in words
                self.refit_failed.emit(f"sweep {self.current} could not be fitted: "
                                       f"{_short(exc)}")
        self.analysis_needed.emit(settings)

    def _steps_for(self, settings: Settings) -> dict:
        return dict(zip((s.index for s in self.recording.sweeps),
                        sweep_steps(self.recording, settings), strict=True))

    def set_step(self, step) -> None:
        """Use `step` (a StepSpec; None = the file's own) for every sweep, and re-analyse.

        Raises LoadError when the step cannot be used (e.g. it lies outside the sweeps);
        nothing changes then.
        """
        settings = replace(self.settings, step=step)
        self._steps_for(settings)          # raises before anything changes
        self._change(settings)

    def set_options(self, **options) -> None:
        """Change analysis options (``components``, ``filter_hz``, ``area_um2``,
        ``bootstrap``, ``correct_bridge``, ``remove_hum``, ``fit_start_ms``) and re-analyse.

        Raises ValueError for a value Settings refuses; nothing changes then.
        """
        self._change(replace(self.settings, **options))

    # ------------------------------------------------------------------ saving
    def save_position(self) -> None:
        """Save the sweep on screen too, when this recording has a review file already."""
        if self.autosave and self.review_file.exists():
            self.try_save()

    @property
    def unsaved(self) -> bool:
        """True when the newest change could not be written (kept in memory only)."""
        return bool(self.save_error)

    def try_save(self) -> bool:
        """Save the review; on failure keep going and emit ``save_failed`` with the reason.

        Every later change tries again; :meth:`save_as` writes it elsewhere.
        """
        try:
            self.save()
        except OSError as exc:
            reason = exc.strerror or str(exc)
            where = exc.filename or self.review_file
            self.save_error = (f"the review could not be saved to {where}: {reason}; your "
                               "changes stay in this window: File › Save review as… keeps "
                               "them in another folder")
            self.save_failed.emit(self.save_error)
            return False
        self.save_error = ""
        return True

    def save(self, path: str | os.PathLike | None = None) -> Path:
        """Write the review file (atomically); returns its path.

        Raises OSError when it cannot be written, or when the review file there could
        not be kept aside (it is never written over then).
        """
        target = Path(path) if path else self.review_file
        if self._blocked and target == self.review_file:
            raise OSError(errno.EEXIST, self._blocked, str(target))
        written = write_review(target,
                               review_document(self.recording, self.settings, self.current))
        self.saved.emit(written)
        return written

    def save_as(self, path: str | os.PathLike) -> Path:
        """Write the review to `path` and keep saving there (OSError when it cannot).

        For a review that cannot be saved where it belongs (read-only folder, full disk).
        A file at `path` that is not a review of this recording is kept aside first.
        """
        path = Path(path)
        if path.exists() and path.resolve() != self.review_file.resolve():
            try:
                read_review(path, self.recording.sha256)
            except ReviewFileError:
                set_aside(path)
        written = write_review(path, review_document(self.recording, self.settings,
                                                     self.current))
        self.review_file, self._blocked, self.save_error = written, "", ""
        self.saved.emit(written)
        return written
