"""Folders of recordings → analyses → cell database (the `passivefit batch` command's work).

How a batch runs:

1. The metadata CSV (``--metadata``) and the options are checked first; any problem
   stops the run before anything is written (exit 2).
2. Folders are scanned recursively for .abf, .nwb, .csv and .tsv files; hidden
   folders, the database, the sheet, the metadata CSV and CSV files that are
   passivefit sheets are left out.
3. Each file is hashed; a file whose content was already analysed with the same
   settings and passivefit version is skipped (``--reanalyse`` adds a new revision
   instead; nothing is ever overwritten).
4. Worker processes load and analyse files in parallel and send back the plain
   ``RecordingResult.to_dict()`` object. Only this (parent) process writes to the
   database, one transaction per recording, as results arrive. One writer means
   no lock contention on SQLite and no database driver in the workers; at most
   ``2 × workers`` files are in flight, so memory does not grow with the folder.
5. A file that cannot be read or analysed is reported and the batch goes on; the
   failed files are listed with their reasons at the end (exit 1 if any failed).

Killed at any moment (even with SIGKILL), the database holds only whole recordings;
running the same command again analyses the rest and skips what is stored.
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
def find_recordings(paths: list[str], exclude: set[Path]) -> list[Path]:
    """Recording files under `paths` (files given directly are always kept), sorted."""
    found: dict[Path, None] = {}
    for given in paths:
        p = Path(given).absolute()  # stored paths must mean the same file later
        if p.is_file():
            found[p] = None
        elif p.is_dir():
            for candidate in sorted(p.rglob("*")):
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
    return not (path.suffix.lower() in (".csv", ".tsv") and _is_own_csv(path))


def _is_own_csv(path: Path) -> bool:
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
    """What a worker made of one file: a result, or the reason it failed."""

    path: str
    result: dict | None = None
    metadata: dict | None = None
    error: str | None = None


def analyse_file(path: str, settings, reports: str | None = None) -> FileOutcome:
    """Load and analyse one file (runs in a worker process); never raises.

    With `reports` (a folder), the worker also writes the recording's PDF report
    there: the arrays it needs never leave the worker.
    """
    try:
        from passivefit.analysis import analyze
        from passivefit.io import load
        from passivefit.io.recording import LoadError

        recording = load(path, channel=settings.reader_channel)
        analysis = analyze(recording, settings)
        if reports:
            from passivefit.export.report import write_report

            write_report([(recording, analysis)], report_path(reports, recording))
        return FileOutcome(path, analysis.to_dict(), _plain_metadata(recording.metadata))
    except LoadError as exc:
        return FileOutcome(path, error=exc.reason)
    except Exception as exc:  # noqa: BLE001 - a bad file must not stop the batch
        return FileOutcome(path, error=f"analysis failed ({type(exc).__name__}: {exc})")


def report_path(folder: str, recording) -> Path:
    """``<folder>/<file stem>-<first 8 hex of sha256>.pdf`` (unique per content)."""
    return Path(folder) / f"{Path(recording.path).stem}-{recording.sha256[:8]}.pdf"


def _plain_metadata(metadata: dict) -> dict:
    return {k: metadata[k] for k in METADATA_KEYS if isinstance(metadata.get(k), str | int | float)}


# ---------------------------------------------------------------------------- progress
class Progress:
    """A one-line progress bar on a terminal, plain lines otherwise."""

    def __init__(self, total: int, stream=None) -> None:
        self.total, self.done, self.stream = total, 0, stream or sys.stderr
        self.tty = self.stream.isatty()
        self.counts = {"stored": 0, "skipped": 0, "failed": 0}

    def update(self, status: str, path: str, detail: str = "") -> None:
        self.done += 1
        self.counts[status] += 1
        if self.tty:
            width = 24
            filled = width * self.done // max(self.total, 1)
            line = (f"\r[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} "
                    f"stored {self.counts['stored']}, skipped {self.counts['skipped']}, "
                    f"failed {self.counts['failed']}  {Path(path).name[:40]}")
            self.stream.write(line.ljust(110)[:110])
            self.stream.flush()
        else:
            text = f"{status:<8} {path}" + (f": {detail}" if detail else "")
            print(text, file=sys.stdout, flush=True)

    def finish(self) -> None:
        if self.tty:
            self.stream.write("\n")
            self.stream.flush()


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


class BatchError(InputError):
    """Options or paths a batch cannot start with (nothing has been written)."""


def run_batch(paths: list[str], db: str, settings, *, workers: int | None = None,
              sheet: str | None = None, metadata: str | None = None,
              reports: str | None = None, reanalyse: bool = False) -> BatchSummary:
    """Analyse every recording under `paths` into the database `db`.

    Everything is checked before anything is written: bad options, an unreadable
    metadata sheet or a missing path raise `BatchError` / `MetadataError`, a database
    that cannot be opened `StoreError`.
    """
    from passivefit.export.sheets import SHEET_SUFFIXES
    from passivefit.io.metadata import read_metadata
    from passivefit.store.database import open_database

    workers = workers if workers is not None else _default_workers()
    if workers < 1:
        raise BatchError(f"`--workers` must be at least 1, not {workers}")
    if sheet and Path(sheet).suffix.lower() not in SHEET_SUFFIXES:
        raise BatchError(f"`--sheet` {sheet}: use one of {', '.join(SHEET_SUFFIXES)}")
    table = read_metadata(metadata) if metadata else MetadataTable()
    if reports:
        try:
            Path(reports).mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise BatchError(f"`--reports` {reports}: cannot create the folder "
                             f"({exc.strerror})") from None
    files = find_recordings(paths, _excluded_paths(db, sheet, metadata))
    notes = match_metadata(table, files)
    database = open_database(db, create=True)
    started = time.perf_counter()
    try:
        summary = _run_files(files, settings, database, notes, workers, reanalyse, reports)
        if sheet:
            _write_sheet(database, summary.hashes, sheet)
    finally:
        database.close()
    summary.seconds = time.perf_counter() - started
    summary.unused_metadata = table.unused()
    return summary


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
               reanalyse: bool, reports: str | None) -> BatchSummary:
    from passivefit import __version__
    from passivefit.io.recording import file_sha256

    digest = settings.settings_hash()
    done = set() if reanalyse else database.analysed_hashes(digest, __version__)
    summary = BatchSummary()
    progress = Progress(len(files))
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
    try:
        for outcome in _analyse_all(todo, settings, workers, reports):
            _store_outcome(outcome, database, metadata, digest, reanalyse, summary, progress)
    finally:
        progress.finish()
    return summary


def _analyse_all(paths: list[Path], settings, workers: int, reports: str | None):
    """Yield a FileOutcome for every path, analysing up to `2 × workers` at once.

    A worker process that dies (out of memory, a crash in a library) fails the files
    it had in hand; a new pool takes over the rest.
    """
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool
    from multiprocessing import get_context

    queue = [str(p) for p in reversed(paths)]
    while queue:
        # spawn, not fork: workers must not inherit the parent's database connections
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=get_context("spawn"))
        running: dict = {}
        try:
            while queue or running:
                while queue and len(running) < 2 * workers:
                    path = queue.pop()
                    running[pool.submit(analyse_file, path, settings, reports)] = path
                finished, _ = wait(running, return_when=FIRST_COMPLETED)
                for future in finished:
                    path = running.pop(future)
                    try:
                        yield future.result()
                    except BrokenProcessPool:
                        yield FileOutcome(path, error="the analysis process died "
                                                      "(out of memory or a crash)")
        except BrokenProcessPool:
            for path in running.values():
                yield FileOutcome(path, error="the analysis process died (out of memory or "
                                              "a crash)")
        finally:
            pool.shutdown(wait=True, cancel_futures=True)


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
    if stored.status == "stored":
        summary.stored.append(outcome.path)
        summary.sweeps += len(outcome.result.get("sweeps", ()))
        cell = outcome.result.get("cell") or {}
        progress.update("stored", outcome.path, f"{len(outcome.result.get('sweeps', ()))} "
                        f"sweeps, tau0 {_fmt(cell.get(S.TAU0.key))} ms, R_in "
                        f"{_fmt(cell.get(S.R_IN.key))} MOhm")
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
