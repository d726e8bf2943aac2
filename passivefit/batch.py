"""Folders of recordings → analyses → cell database (the `passivefit batch` command's work).

How a batch runs:

1. The metadata CSV (``--metadata``) and the options are checked first; any problem
   stops the run before anything is written (exit 2).
2. Folders are scanned recursively for .abf, .nwb, .csv and .tsv files; hidden
   folders, the database, the sheet, the metadata CSV and CSV files that are
   passivefit sheets are left out. A folder that cannot be read is a failure.
   Metadata rows are matched by path (relative to the metadata CSV); a bare file
   name that matches files in two folders stops the run.
3. Each file is hashed; a file whose content was already analysed with the same
   settings and passivefit version is skipped (``--reanalyse`` adds a new revision
   instead; nothing is ever overwritten).
4. Worker processes load and analyse one file at a time each and send back the plain
   ``RecordingResult.to_dict()`` object. Only this (parent) process writes to the
   database, one transaction per recording, as results arrive. One writer means
   no lock contention on SQLite and no database driver in the workers. Each file
   has a time limit (a worker over it is killed and replaced) and each worker a
   memory limit (`Limits`); workers end when this process ends, even by SIGKILL.
5. A file that cannot be read or analysed is reported and the batch goes on; the
   failed files are listed with their reasons at the end (exit 1 if any failed).
   A PDF report (``--reports``) is written under a temporary name and renamed when
   complete; a report that cannot be written is listed, and its analysis is stored.
6. The cell of a recording is the metadata's ``cell_id``, else the file's own cell
   id (unless another folder already holds a cell of that name), else the folder
   and the file stem (``day1/c1``): never the file name alone.

Killed at any moment (even with SIGKILL), the database holds only whole recordings;
running the same command again analyses the rest and skips what is stored. A
database that fails while the batch writes (full disk, read-only) stops the batch
with one line; what was stored stays.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from passivefit.io.metadata import MetadataTable
from passivefit.model import schema as S
from passivefit.model.errors import InputError
from passivefit.model.schema import METADATA_KEYS

RECORDING_SUFFIXES = (".abf", ".nwb", ".csv", ".tsv")
# First header cell of CSV files that passivefit writes itself (sheets, metadata).
_OWN_CSV_HEADERS = ("source_path", "file")


# ---------------------------------------------------------------------------- scanning
def find_recordings(paths: list[str], exclude: set[Path],
                    unreadable: list[tuple[str, str]] | None = None) -> list[Path]:
    """Recording files under `paths` (files given directly are always kept), sorted.

    Folders that cannot be read are appended to `unreadable` as (folder, reason) instead
    of being skipped silently.
    """
    import os

    found: dict[Path, None] = {}
    for given in paths:
        p = Path(given).absolute()  # stored paths must mean the same file later
        if p.is_file():
            found[p] = None
        elif p.is_dir():
            def failed(exc: OSError, root: Path = p) -> None:
                if unreadable is not None:
                    unreadable.append((str(exc.filename or root), "cannot read the folder "
                                       f"({exc.strerror or exc}); its recordings were not "
                                       "analysed"))

            candidates: list[Path] = []
            for folder, dirs, names in os.walk(p, onerror=failed):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                candidates += [Path(folder) / name for name in names]
            for candidate in sorted(candidates):
                if _is_candidate(candidate, p, exclude):
                    found[candidate] = None
        else:
            raise BatchError(f"{given}: no such file or folder")
    return list(found)


def _is_candidate(path: Path, root: Path, exclude: set[Path]) -> bool:
    if path.suffix.lower() not in RECORDING_SUFFIXES or not path.is_file():
        return False
    if any(part.startswith(".") for part in path.relative_to(root).parts):
        return False
    if path.resolve() in exclude:
        return False
    return not (path.suffix.lower() in (".csv", ".tsv") and is_own_csv(path))


def is_own_csv(path: Path) -> bool:
    """True for sheets and metadata tables: their header starts with one of our names."""
    try:
        with open(path, encoding="utf-8-sig", errors="replace") as f:
            first = f.readline(4096)
    except OSError:
        return False
    head = first.replace("\t", ",").split(",")[0].strip().strip('"')
    return head in _OWN_CSV_HEADERS


def _excluded_paths(db: str, sheet: str | None, metadata: str | None) -> set[Path]:
    """The batch's own files, never taken for recordings."""
    from passivefit.store.database import database_url

    out: set[Path] = set()
    url = database_url(db)
    if url.startswith("sqlite:///"):
        path = Path(url[len("sqlite:///"):])
        out |= {path, Path(f"{path}-wal"), Path(f"{path}-shm")}
    if sheet:
        resolved = Path(sheet).resolve()
        out |= {resolved, resolved.with_name(f"{resolved.stem}_sweeps{resolved.suffix}")}
    if metadata:
        out.add(Path(metadata).resolve())
    return out


# ---------------------------------------------------------------------------- workers
@dataclass(frozen=True)
class FileOutcome:
    """What a worker made of one file: a result, or the reason it failed.

    `report_error` says why the PDF report of an analysed file was not written (the
    result is stored all the same).
    """

    path: str
    result: dict | None = None
    metadata: dict | None = None
    error: str | None = None
    report_error: str | None = None


@dataclass(frozen=True)
class Limits:
    """Bounds on one file's analysis in a batch worker.

    Attributes
    ----------
    seconds : float
        Wall-clock time per file (s); a file over it fails and its worker is replaced.
    memory_mb : int
        Address space per worker process (MiB); 0 for no limit. A file that needs more
        fails with MemoryError's reason.
    """

    seconds: float = 300.0
    memory_mb: int = 4096


def analyse_file(path: str, settings, reports: str | None = None) -> FileOutcome:
    """Load and analyse one file (runs in a worker process).

    Never raises, except MemoryError, which the worker reports with its limit. With
    `reports` (a folder), the worker also writes the recording's PDF report there: the
    arrays it needs never leave the worker. A report that cannot be written leaves the
    result intact and says why in `report_error`.
    """
    try:
        from passivefit.analysis import analyze
        from passivefit.io import load
        from passivefit.io.recording import LoadError

        recording = load(path, channel=settings.reader_channel)
        analysis = analyze(recording, settings, advise=False)  # advice is for the rig
        outcome = FileOutcome(path, analysis.to_dict(), _plain_metadata(recording.metadata))
    except LoadError as exc:
        return FileOutcome(path, error=exc.reason)
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001 - a bad file must not stop the batch
        return FileOutcome(path, error=f"analysis failed ({type(exc).__name__}: {exc})")
    if reports:
        try:
            from passivefit.export.report import write_report

            write_report([(recording, analysis)], report_path(reports, recording))
        except OSError as exc:
            why = f"report not written ({exc.strerror or exc})"
            return FileOutcome(path, outcome.result, outcome.metadata, report_error=why)
        except Exception as exc:  # noqa: BLE001 - the analysis is kept all the same
            why = f"report not written ({type(exc).__name__}: {exc})"
            return FileOutcome(path, outcome.result, outcome.metadata, report_error=why)
    return outcome


def report_path(folder: str, recording) -> Path:
    """``<folder>/<file stem>-<first 8 hex of sha256>.pdf`` (unique per content)."""
    return Path(folder) / f"{Path(recording.path).stem}-{recording.sha256[:8]}.pdf"


def _plain_metadata(metadata: dict) -> dict:
    return {k: metadata[k] for k in METADATA_KEYS if isinstance(metadata.get(k), str | int | float)}


# ---------------------------------------------------------------------------- progress
@dataclass(frozen=True)
class ProgressEvent:
    """Where a batch stands after a file (or at its start, with `status` "").

    Attributes
    ----------
    status : str
        What happened to the file: "stored", "skipped" or "failed"; "" at the start.
    path, detail : str
        The file, and what to say about it (the sweeps and values, or why).
    done, total : int
        Files finished (any status) and files in the batch.
    stored, skipped, failed : int
        Files finished with each status.
    sweeps : int
        Sweeps analysed and stored so far.
    elapsed_s : float
        Seconds since the batch started.
    """

    status: str
    path: str
    detail: str
    done: int
    total: int
    stored: int
    skipped: int
    failed: int
    sweeps: int
    elapsed_s: float

    @property
    def sweeps_per_s(self) -> float | None:
        """Sweeps analysed per second so far (None before the first)."""
        return self.sweeps / self.elapsed_s if self.sweeps and self.elapsed_s > 0 else None

    @property
    def remaining_s(self) -> float | None:
        """Seconds left, from the time per analysed file so far (None before the first;
        skipped files take no time and are not counted)."""
        analysed = self.stored + self.failed
        if not analysed or self.elapsed_s <= 0:
            return None
        return (self.total - self.done) * self.elapsed_s / analysed

    def summary(self) -> str:
        """One line: files done of total, sweeps per second, time left, counts."""
        rate = self.sweeps_per_s
        left = self.remaining_s
        return (f"{self.done}/{self.total} files · "
                f"{'—' if rate is None else f'{rate:.1f}'} sweeps/s · "
                f"{'—' if left is None else clock_time(left)} left · "
                f"stored {self.stored}, skipped {self.skipped}, failed {self.failed}")


def clock_time(seconds: float) -> str:
    """Seconds as m:ss, or h:mm:ss from an hour on."""
    whole = int(round(max(seconds, 0.0)))
    hours, rest = divmod(whole, 3600)
    minutes, secs = divmod(rest, 60)
    return f"{hours}:{minutes:02d}:{secs:02d}" if hours else f"{minutes}:{secs:02d}"


class Progress:
    """Counts a batch's files and sweeps and passes a :class:`ProgressEvent` to
    `callback` after each file (and one at the start).

    The default callback is a :class:`ConsoleProgress` on `stream` (stderr): one
    updating line on a terminal, plain lines otherwise.
    """

    def __init__(self, total: int, callback=None, *, stream=None, clock=time.monotonic) -> None:
        self.total, self.done, self.sweeps = total, 0, 0
        self.callback = callback if callback is not None else ConsoleProgress(stream)
        self.clock = clock
        self.started = clock()
        self.counts = {"stored": 0, "skipped": 0, "failed": 0}

    def event(self, status: str = "", path: str = "", detail: str = "") -> ProgressEvent:
        return ProgressEvent(status, path, detail, self.done, self.total, self.counts["stored"],
                             self.counts["skipped"], self.counts["failed"], self.sweeps,
                             self.clock() - self.started)

    def start(self) -> None:
        self.callback(self.event())

    def update(self, status: str, path: str, detail: str = "", sweeps: int = 0) -> None:
        self.done += 1
        self.counts[status] += 1
        self.sweeps += sweeps
        self.callback(self.event(status, path, detail))

    def finish(self) -> None:
        finish = getattr(self.callback, "finish", None)
        if finish is not None:
            finish()


class ConsoleProgress:
    """A batch's progress on a terminal: one line rewritten after each file (bar, files
    done of total, sweeps per second, time left, counts) on `stream` when it is a
    terminal; otherwise one plain line per file on stdout."""

    WIDTH = 24

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stderr
        self.tty = _is_terminal(self.stream)
        self.shown = False

    def __call__(self, event: ProgressEvent) -> None:
        if self.tty:
            filled = self.WIDTH * event.done // max(event.total, 1)
            line = (f"\r[{'#' * filled}{'.' * (self.WIDTH - filled)}] {event.summary()}  "
                    f"{Path(event.path).name[:40]}")
            self.stream.write(line.ljust(130)[:130])
            self.stream.flush()
            self.shown = True
        elif event.status:
            text = f"{event.status:<8} {event.path}" + (f": {event.detail}" if event.detail
                                                        else "")
            print(text, file=sys.stdout, flush=True)

    def finish(self) -> None:
        if self.shown:
            self.stream.write("\n")
            self.stream.flush()


def _is_terminal(stream) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):   # no isatty, or a closed stream
        return False


# ---------------------------------------------------------------------------- the run
@dataclass
class BatchSummary:
    stored: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    failed: list[tuple[str, str]] = field(default_factory=list)
    sweeps: int = 0
    hashes: list[str] = field(default_factory=list)
    seconds: float = 0.0
    unused_metadata: int = 0
    report_failed: list[tuple[str, str]] = field(default_factory=list)
    not_started: list[str] = field(default_factory=list)   # left when the batch was stopped


class BatchError(InputError):
    """Options or paths a batch cannot start with (nothing has been written)."""


def run_batch(paths: list[str], db: str, settings, *, workers: int | None = None,
              sheet: str | None = None, metadata: str | None = None,
              reports: str | None = None, reanalyse: bool = False,
              limits: Limits = Limits(), progress=None, stop=None) -> BatchSummary:
    """Analyse every recording under `paths` into the database `db`.

    `progress(event)` is called with a :class:`ProgressEvent` once at the start and after
    every file (in this thread); the default, :class:`ConsoleProgress`, draws one line on
    a terminal and prints a line per file otherwise. It may have a ``finish()``, called
    at the end.

    `stop()`, when given, is asked after every file: once it returns True the files in
    progress are abandoned, the worker processes end, and the files not yet analysed are
    listed in `not_started` (what was stored stays stored).

    Everything is checked before anything is written: bad options, an unreadable
    metadata sheet, a sheet that cannot be written or a missing path raise
    `BatchError` / `MetadataError`, a database that cannot be opened `StoreError`.
    A database that fails while the batch writes (a full disk, a read-only file)
    stops it with `StoreError`; what was stored before stays. Folders that cannot be
    read are listed in `failed`; reports that cannot be written in `report_failed`
    (their analyses are stored).
    """
    from passivefit.export.sheets import SHEET_SUFFIXES
    from passivefit.io.metadata import read_metadata

    workers = workers if workers is not None else _default_workers()
    if workers < 1:
        raise BatchError(f"`--workers` must be at least 1, not {workers}")
    if sheet and Path(sheet).suffix.lower() not in SHEET_SUFFIXES:
        raise BatchError(f"`--sheet` {sheet}: use one of {', '.join(SHEET_SUFFIXES)}")
    if sheet:
        _check_writable(sheet, "--sheet")
    table = read_metadata(metadata) if metadata else MetadataTable()
    if reports:
        try:
            Path(reports).mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise BatchError(f"`--reports` {reports}: cannot create the folder "
                             f"({exc.strerror})") from None
    # the workers start now and import the analysis while this process opens the database
    # and reads the files' hashes
    pool = _start_workers(workers, limits)
    try:
        unreadable: list[tuple[str, str]] = []
        files = find_recordings(paths, _excluded_paths(db, sheet, metadata), unreadable)
        notes = match_metadata(table, files)
        database = _open(db)
    except BaseException:
        _close_all(pool)
        raise
    started = time.perf_counter()
    try:
        summary = _run_files(files, settings, database, notes, workers, reanalyse, reports,
                             limits, db, progress, stop, pool)
        summary.failed[:0] = unreadable
        if sheet:
            try:
                _write_sheet(database, summary.hashes, sheet)
            except OSError as exc:
                raise BatchError(f"`--sheet` {sheet}: cannot write it ({exc.strerror or exc}); "
                                 "the analyses are stored: write the sheet with `passivefit "
                                 "db export`") from None
    finally:
        _close_all(pool)   # those no file reached (the others are closed already)
        database.close()
    summary.seconds = time.perf_counter() - started
    summary.unused_metadata = table.unused()
    return summary


def _open(db: str):
    """The database, or StoreError in one line for anything that is not one."""
    from sqlalchemy.exc import SQLAlchemyError

    from passivefit.store.database import StoreError, open_database

    try:
        return open_database(db, create=True)
    except SQLAlchemyError as exc:
        raise StoreError(f"`--db` {db}: cannot use it as a database ({_first_line(exc)})"
                         ) from None
    except OSError as exc:
        raise StoreError(f"`--db` {db}: cannot open it ({exc.strerror or exc})") from None


def _first_line(exc: Exception) -> str:
    orig = getattr(exc, "orig", None)
    text = str(orig if orig is not None else exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _check_writable(path: str, option: str) -> None:
    """BatchError unless `path` can be created or replaced (leaves no file behind)."""
    target = Path(path)
    existed = target.exists()
    try:
        with open(target, "ab"):
            pass
    except OSError as exc:
        raise BatchError(f"`{option}` {path}: cannot write it ({exc.strerror or exc})"
                         ) from None
    if not existed:
        target.unlink(missing_ok=True)


def match_metadata(table: MetadataTable, files: list[Path]) -> dict[Path, dict]:
    """The metadata row of each file: by its path relative to the metadata CSV; a bare
    file name matches a file elsewhere only when no other file of this batch has that
    name (else `BatchError` naming both).
    """
    unmatched: dict[str, list[Path]] = {}
    for path in files:
        if str(path.resolve()) not in table.by_path:
            unmatched.setdefault(path.name, []).append(path)
    claimed = {id(table.by_path[str(p.resolve())]) for p in files
               if str(p.resolve()) in table.by_path}
    matched: dict[Path, dict] = {}
    for path in files:
        row = table.by_path.get(str(path.resolve()))
        if row is None:
            row = table.by_name.get(path.name)
            if row is None or id(row) in claimed:  # the row names another file by its path
                continue
            if len(unmatched[path.name]) > 1:
                a, b = unmatched[path.name][:2]
                raise BatchError(f"`--metadata`: the row {row['file']!r} matches both {a} and "
                                 f"{b}; give the file's path relative to the metadata CSV")
        table.used.add(row["file"])
        matched[path] = {k: v for k, v in row.items() if k != "file"}
    return matched


def _default_workers() -> int:
    import os

    return max(1, min(2, os.cpu_count() or 1))


def _run_files(files: list[Path], settings, database, metadata: dict[Path, dict], workers: int,
               reanalyse: bool, reports: str | None, limits: Limits = Limits(),
               db: str = "", callback=None, stop=None, pool=None) -> BatchSummary:
    from sqlalchemy.exc import SQLAlchemyError

    from passivefit import __version__
    from passivefit.io.recording import file_sha256
    from passivefit.store.database import StoreError

    digest = settings.settings_hash()
    done = set() if reanalyse else database.analysed_hashes(digest, __version__)
    summary = BatchSummary()
    progress = Progress(len(files), callback)
    progress.start()
    todo: list[Path] = []
    seen: dict[str, Path] = {}
    for path in files:
        try:
            sha = file_sha256(path)
        except OSError as exc:
            summary.failed.append((str(path), f"cannot read the file ({exc.strerror})"))
            progress.update("failed", str(path), exc.strerror or "")
            continue
        notes = metadata.get(path, {})
        if sha in seen or sha in done:
            why = (f"same content as {seen[sha]}" if sha in seen
                   else "already analysed with these settings")
            if notes and sha not in seen and database.update_cell_metadata(sha, notes):
                why += "; cell metadata applied"
            summary.skipped.append(str(path))
            summary.hashes.append(sha)
            progress.update("skipped", str(path), why)
        else:
            todo.append(path)
        seen.setdefault(sha, path)
    finished: set[str] = set()
    outcomes = _analyse_all(todo, settings, workers, reports, limits, started=pool)
    try:
        for outcome in outcomes:
            _store_outcome(outcome, database, metadata, digest, reanalyse, summary, progress)
            finished.add(str(outcome.path))
            if stop is not None and stop():
                outcomes.close()   # its workers end
                summary.not_started = [str(p) for p in todo if str(p) not in finished]
                break
    except (SQLAlchemyError, OSError) as exc:
        reason = _first_line(exc) if isinstance(exc, SQLAlchemyError) else exc.strerror
        raise StoreError(f"`--db` {db}: cannot write to the database ({reason}); "
                         f"{len(summary.stored)} recordings of this batch were stored before "
                         "it stopped; run the same command again to analyse the rest"
                         ) from None
    finally:
        progress.finish()
    return summary


_DIED = "the analysis process died (out of memory or a crash)"


def _context():
    """Spawned worker processes (not forked: no inherited database connections), each with
    one BLAS thread (one process per core: BLAS threads would only contend)."""
    from multiprocessing import get_context

    from passivefit import one_blas_thread

    one_blas_thread()   # (read by each worker as it imports numpy)
    return get_context("spawn")


def _start_workers(workers: int, limits: Limits) -> list[_Worker]:
    """`workers` analysis processes, started (they import the analysis as they start)."""
    context = _context()
    return [_Worker(context, limits, None) for _ in range(workers)]


def _close_all(pool: list[_Worker]) -> None:
    for w in pool:
        w.stop()
    for w in pool:
        w.close()


def _analyse_all(paths: list[Path], settings, workers: int, reports: str | None,
                 limits: Limits = Limits(), work=None, started: list[_Worker] | None = None):
    """Yield a FileOutcome for every path, one file per worker process at a time.

    Each file has `limits.seconds`: a file over time fails and its worker is killed and
    replaced; so is a worker that dies (out of memory, a crash in a library). Workers
    die with this process (`_worker_main`). `work(path, settings, reports)` replaces
    `analyse_file` (a module-level function; tests use it). `started`: workers started
    already (`_start_workers`), used instead of new ones; those beyond the number of
    files are closed.
    """
    context = _context()
    queue = [str(p) for p in reversed(paths)]
    pool: list[_Worker] = list(started or [])
    spare, pool = pool[len(queue):], pool[:len(queue)]
    for w in spare:
        w.kill()
        w.close()
    starts_failed = 0

    def hand_out() -> None:
        for w in pool:
            if w.ready and w.path is None and queue and w.process.is_alive():
                w.give(queue.pop(), settings, reports, limits.seconds)

    try:
        missing = min(workers, len(queue)) - len(pool)
        pool += [_Worker(context, limits, work) for _ in range(missing)]
        while queue or any(w.path for w in pool):
            hand_out()
            done = list(_collect(pool, limits))
            hand_out()   # the next files before these are stored: no worker waits
            yield from done
            for k, w in enumerate(pool):
                if w.process.is_alive():
                    continue
                if not w.ready:  # died before it could start: don't respawn for ever
                    starts_failed += 1
                if starts_failed > 3:
                    for path in reversed(queue):
                        yield FileOutcome(path, error="the analysis process could not start")
                    queue.clear()
                    continue
                w.close()
                pool[k] = _Worker(context, limits, work) if queue else w
            pool = [w for w in pool if w.process.is_alive() or w.path]
    finally:
        _close_all(pool)


def _collect(pool: list[_Worker], limits: Limits):
    """Wait for the next message, death or deadline among `pool`; yield finished files."""
    import time
    from multiprocessing.connection import wait

    busy = [w.deadline for w in pool if w.path]
    timeout = max(0.0, min(busy) - time.monotonic()) if busy else None
    ready = wait([w.conn for w in pool] + [w.process.sentinel for w in pool], timeout)
    for w in pool:
        if w.conn in ready:
            try:
                message = w.conn.recv()
            except (EOFError, OSError):
                message = _DIED
            if message is None:
                w.ready = True
                continue
            if isinstance(message, FileOutcome):
                w.path = None
                yield message
                continue
        if w.path and (w.process.sentinel in ready or w.conn in ready):
            path, w.path = w.path, None
            w.kill()
            yield FileOutcome(path, error=_DIED)
        elif w.path and time.monotonic() >= w.deadline:
            path, w.path = w.path, None
            w.kill()
            yield FileOutcome(path, error=f"took longer than {limits.seconds:g} s, the limit "
                                          "per file (`--file-timeout`)")
        elif w.process.sentinel in ready:
            w.kill()


class _Worker:
    """One analysis process, fed one file at a time through a pipe."""

    def __init__(self, context, limits: Limits, work) -> None:
        import os

        self.conn, child = context.Pipe()
        self.process = context.Process(
            target=_worker_main, args=(child, os.getpid(), limits.memory_mb, work),
            daemon=True, name="passivefit-worker")
        self.process.start()
        child.close()
        self.ready = False
        self.path: str | None = None
        self.deadline = 0.0

    def give(self, path: str, settings, reports: str | None, seconds: float) -> None:
        import time

        self.conn.send((path, settings, reports))
        self.path, self.deadline = path, time.monotonic() + seconds

    def kill(self) -> None:
        if self.process.is_alive():
            self.process.kill()
        self.process.join()

    def stop(self) -> None:
        """Ask an idle worker to finish; a busy one is killed."""
        try:
            if self.path is None and self.process.is_alive():
                self.conn.send(None)
        except OSError:
            pass

    def close(self) -> None:
        self.process.join(timeout=5 if self.path is None else 0)
        self.kill()
        self.conn.close()


def _worker_main(conn, parent_pid: int, memory_mb: int, work=None) -> None:
    """A worker process: bounded, tied to its parent, analysing one file per message."""
    import warnings

    _die_with_parent(parent_pid)
    _limit_memory(memory_mb)
    warnings.simplefilter("ignore")  # numerical warnings must not reach the batch's stderr
    if work is None:   # the analysis imported before the first file
        import passivefit.analysis  # noqa: F401
        import passivefit.io  # noqa: F401
    work = work or analyse_file
    conn.send(None)  # ready
    while True:
        try:
            task = conn.recv()
        except (EOFError, OSError):
            return
        if task is None:
            return
        path, settings, reports = task
        try:
            outcome = work(path, settings, reports)
        except MemoryError:
            outcome = FileOutcome(path, error=f"out of memory: over the {memory_mb} MB limit "
                                              "per file (`--file-memory-mb`)")
        except Exception as exc:  # noqa: BLE001 - a bad file must not stop the batch
            outcome = FileOutcome(path, error=f"analysis failed ({type(exc).__name__}: {exc})")
        conn.send(outcome)


def _die_with_parent(parent_pid: int) -> None:
    """End this process when the batch process ends, even by SIGKILL.

    Linux: the kernel sends SIGKILL on the parent's death (prctl PR_SET_PDEATHSIG);
    elsewhere, and as a back-up, a thread polls the parent's pid once a second.
    """
    import os
    import threading
    import time

    if sys.platform.startswith("linux"):
        try:
            import ctypes
            import signal

            ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):
            pass
    if os.getppid() != parent_pid:  # the parent died before the line above
        os._exit(1)

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, daemon=True, name="parent-watch").start()


def _limit_memory(memory_mb: int) -> None:
    """Bound this process's address space to `memory_mb` MiB (0: no bound; POSIX only)."""
    if memory_mb <= 0:
        return
    try:
        import resource
    except ImportError:  # Windows
        return
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    limit = memory_mb * 2**20
    if hard != resource.RLIM_INFINITY:
        limit = min(limit, hard)
    resource.setrlimit(resource.RLIMIT_AS, (limit, hard))


def _store_outcome(outcome: FileOutcome, database, metadata: dict[Path, dict], digest: str,
                   reanalyse: bool, summary: BatchSummary, progress: Progress) -> None:
    if outcome.result is None:
        summary.failed.append((outcome.path, outcome.error or "unknown error"))
        progress.update("failed", outcome.path, outcome.error or "")
        return
    from_file = dict(outcome.metadata or {})
    file_cell_id = from_file.pop(S.CELL_ID.key, None)
    cell_metadata = {**from_file, **{
        k: v for k, v in metadata.get(Path(outcome.path), {}).items() if v is not None}}
    stored = database.store(outcome.result, cell_metadata=cell_metadata, settings_hash=digest,
                            if_exists="new_revision" if reanalyse else "skip",
                            file_cell_id=None if file_cell_id is None else str(file_cell_id))
    summary.hashes.append(outcome.result["source"]["sha256"])
    if outcome.report_error:
        summary.report_failed.append((outcome.path, outcome.report_error))
    if stored.status == "stored":
        summary.stored.append(outcome.path)
        summary.sweeps += len(outcome.result.get("sweeps", ()))
        cell = outcome.result.get("cell") or {}
        n_sweeps = len(outcome.result.get("sweeps", ()))
        used = cell.get(S.N_SWEEPS_USED.key)
        progress.update("stored", outcome.path, f"{n_sweeps} sweeps ({_fmt(used)} used), tau0 "
                        f"{_fmt(cell.get(S.TAU0.key))} ms, R_in {_fmt(cell.get(S.R_IN.key))} MOhm",
                        sweeps=n_sweeps)
    else:
        summary.skipped.append(outcome.path)
        progress.update("skipped", outcome.path, "stored meanwhile by another writer")


def _fmt(value) -> str:
    return "—" if value is None else f"{value:.4g}"


def _write_sheet(database, hashes: list[str], sheet: str) -> None:
    from passivefit.export.sheets import write_sheet
    from passivefit.store.database import annotations_of

    wanted = set(hashes)
    rows = [r for r in database.current_analyses() if r.recording["sha256"] in wanted]
    written = write_sheet([r.result for r in rows], sheet, annotations=annotations_of(rows))
    print("sheet: " + ", ".join(str(p) for p in written))
