"""`passivefit batch PATH ... --db URL`: folders of recordings → analyses → cell database.

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

import argparse
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from passivefit.commands.analyze import add_settings_arguments

RECORDING_SUFFIXES = (".abf", ".nwb", ".csv", ".tsv")
METADATA_COLUMNS = ("file", "cell_id", "date", "preparation", "region", "cell_type",
                    "temperature_C", "internal_solution", "notes")
# First header cell of CSV files that passivefit writes itself (sheets, metadata).
_OWN_CSV_HEADERS = ("source_path", "file")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("paths", nargs="+", metavar="PATH", help="recording files or folders")
    p.add_argument("--db", required=True, metavar="URL",
                   help="database: an SQLite file path, sqlite:///FILE or "
                        "postgresql+psycopg://USER@HOST/DB")
    p.add_argument("--workers", type=int, metavar="N",
                   help="analysis processes (default: min(2, CPUs))")
    p.add_argument("--sheet", metavar="FILE",
                   help="also write the current results of these files to FILE "
                        "(.csv/.tsv, .xlsx or .json)")
    p.add_argument("--metadata", metavar="FILE.csv",
                   help="cell metadata: a `file` column plus any of " + ", ".join(
                       METADATA_COLUMNS[1:]))
    p.add_argument("--reports", metavar="DIR",
                   help="also write a PDF report per analysed recording into DIR "
                        "(<file stem>-<hash prefix>.pdf; slower)")
    p.add_argument("--reanalyse", action="store_true",
                   help="analyse files already in the database again and store a new "
                        "revision (earlier analyses are kept)")
    add_settings_arguments(p)


# ---------------------------------------------------------------------------- metadata
@dataclass
class MetadataTable:
    """Rows of a metadata CSV keyed by the resolved file path and by bare file name."""

    by_path: dict[str, dict] = field(default_factory=dict)
    by_name: dict[str, dict] = field(default_factory=dict)
    used: set[str] = field(default_factory=set)

    def lookup(self, path: Path) -> dict:
        key = str(path.resolve())
        row = self.by_path.get(key) or self.by_name.get(path.name)
        if row is None:
            return {}
        self.used.add(row["file"])
        return {k: v for k, v in row.items() if k != "file"}

    def unused(self) -> int:
        """Number of rows that matched none of the files seen so far."""
        listed = {row["file"] for row in (*self.by_path.values(), *self.by_name.values())}
        return len(listed - self.used)


def read_metadata(path: str) -> MetadataTable:
    """Read and check a metadata CSV; any problem is a one-line UsageError.

    The CSV has a header row with a ``file`` column (a file name, or a path relative
    to the CSV's folder, or an absolute path) and any of the cell columns
    ``cell_id, date (YYYY-MM-DD), preparation, region, cell_type, temperature_C,
    internal_solution, notes``. Empty cells mean "not known".
    """
    import csv
    from datetime import date

    from passivefit.cli import UsageError

    source = Path(path)
    where = f"`--metadata` {path}"
    try:
        with open(source, newline="", encoding="utf-8-sig") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise UsageError(f"{where}: cannot read it ({exc})") from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise UsageError(f"{where}: the file is empty; give a header row such as "
                         "file,cell_id,region")
    header = [h.strip() for h in rows[0]]
    unknown = [h for h in header if h not in METADATA_COLUMNS]
    if unknown:
        raise UsageError(f"{where}: unknown column(s) {', '.join(map(repr, unknown))}; "
                         f"allowed: {', '.join(METADATA_COLUMNS)}")
    if "file" not in header or len(set(header)) != len(header):
        raise UsageError(f"{where}: the header needs one `file` column and no repeated "
                         f"names (found {', '.join(header)})")
    table = MetadataTable()
    for line, raw in enumerate(rows[1:], start=2):
        if len(raw) != len(header):
            raise UsageError(f"{where} row {line}: {len(raw)} fields, the header has "
                             f"{len(header)}; quote values that contain commas")
        row = {h: v.strip() or None for h, v in zip(header, raw, strict=True)}
        if not row["file"]:
            raise UsageError(f"{where} row {line}: the `file` cell is empty")
        if row.get("temperature_C") is not None:
            try:
                row["temperature_C"] = float(row["temperature_C"])
            except ValueError:
                raise UsageError(f"{where} row {line}: temperature_C {row['temperature_C']!r} "
                                 "is not a number; give degrees Celsius, e.g. 32") from None
        if row.get("date") is not None:
            try:
                date.fromisoformat(row["date"])
            except ValueError:
                raise UsageError(f"{where} row {line}: date {row['date']!r} is not "
                                 "YYYY-MM-DD, e.g. 2026-11-03") from None
        resolved = str((source.parent / row["file"]).resolve())
        if resolved in table.by_path:
            raise UsageError(f"{where} row {line}: {row['file']!r} is listed twice")
        table.by_path[resolved] = row
        if "/" not in row["file"] and "\\" not in row["file"]:
            table.by_name.setdefault(row["file"], row)
    return table


# ---------------------------------------------------------------------------- scanning
def find_recordings(paths: list[str], exclude: set[Path]) -> list[Path]:
    """Recording files under `paths` (files given directly are always kept), sorted."""
    from passivefit.cli import UsageError

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
            raise UsageError(f"{given}: no such file or folder")
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


def _excluded_paths(args: argparse.Namespace) -> set[Path]:
    from passivefit.store.database import database_url

    out: set[Path] = set()
    url = database_url(args.db)
    if url.startswith("sqlite:///"):
        db = Path(url[len("sqlite:///"):])
        out |= {db, Path(f"{db}-wal"), Path(f"{db}-shm")}
    if args.sheet:
        sheet = Path(args.sheet).resolve()
        out |= {sheet, sheet.with_name(f"{sheet.stem}_sweeps{sheet.suffix}")}
    if args.metadata:
        out.add(Path(args.metadata).resolve())
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

        recording = load(path)
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
    keys = METADATA_COLUMNS[1:]
    return {k: metadata[k] for k in keys if isinstance(metadata.get(k), str | int | float)}


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


def run(args: argparse.Namespace) -> int:
    from passivefit.cli import UsageError
    from passivefit.commands.analyze import settings_from
    from passivefit.export.sheets import SHEET_SUFFIXES
    from passivefit.store.database import StoreError, open_database

    settings = settings_from(args)
    workers = args.workers if args.workers is not None else _default_workers()
    if workers < 1:
        raise UsageError(f"`--workers` must be at least 1, not {workers}")
    if args.sheet and Path(args.sheet).suffix.lower() not in SHEET_SUFFIXES:
        raise UsageError(f"`--sheet` {args.sheet}: use one of {', '.join(SHEET_SUFFIXES)}")
    metadata = read_metadata(args.metadata) if args.metadata else MetadataTable()
    if args.reports:
        try:
            Path(args.reports).mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UsageError(f"`--reports` {args.reports}: cannot create the folder "
                             f"({exc.strerror})") from None
    files = find_recordings(args.paths, _excluded_paths(args))
    try:
        database = open_database(args.db, create=True)
    except StoreError as exc:
        raise UsageError(str(exc)) from None
    started = time.perf_counter()
    try:
        summary = _run_files(files, settings, database, metadata, workers, args.reanalyse,
                             args.reports)
        if args.sheet:
            _write_sheet(database, summary.hashes, args.sheet)
    finally:
        database.close()
    _report(summary, metadata, time.perf_counter() - started)
    return 1 if summary.failed else 0


def _default_workers() -> int:
    import os

    return max(1, min(2, os.cpu_count() or 1))


def _run_files(files: list[Path], settings, database, metadata: MetadataTable, workers: int,
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
        notes = metadata.lookup(path)
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


def _store_outcome(outcome: FileOutcome, database, metadata: MetadataTable, digest: str,
                   reanalyse: bool, summary: BatchSummary, progress: Progress) -> None:
    if outcome.result is None:
        summary.failed.append((outcome.path, outcome.error or "unknown error"))
        progress.update("failed", outcome.path, outcome.error or "")
        return
    cell_metadata = {**(outcome.metadata or {}), **{
        k: v for k, v in metadata.lookup(Path(outcome.path)).items() if v is not None}}
    stored = database.store(outcome.result, cell_metadata=cell_metadata, settings_hash=digest,
                            if_exists="new_revision" if reanalyse else "skip")
    summary.hashes.append(outcome.result["source"]["sha256"])
    if stored.status == "stored":
        summary.stored.append(outcome.path)
        summary.sweeps += len(outcome.result.get("sweeps", ()))
        cell = outcome.result.get("cell") or {}
        progress.update("stored", outcome.path, f"{len(outcome.result.get('sweeps', ()))} "
                        f"sweeps, tau0 {_fmt(cell.get('tau0_ms'))} ms, R_in "
                        f"{_fmt(cell.get('r_in_MOhm'))} MOhm")
    else:
        summary.skipped.append(outcome.path)
        progress.update("skipped", outcome.path, "stored meanwhile by another writer")


def _fmt(value) -> str:
    return "—" if value is None else f"{value:.4g}"


def _write_sheet(database, hashes: list[str], sheet: str) -> None:
    from passivefit.export.sheets import write_sheet
    from passivefit.store.commands import annotations_of

    wanted = set(hashes)
    rows = [r for r in database.current_analyses() if r.recording["sha256"] in wanted]
    written = write_sheet([r.result for r in rows], sheet, annotations=annotations_of(rows))
    print("sheet: " + ", ".join(str(p) for p in written))


def _report(summary: BatchSummary, metadata: MetadataTable, seconds: float) -> None:
    total = len(summary.stored) + len(summary.skipped) + len(summary.failed)
    rate = f", {summary.sweeps / seconds:.0f} sweeps/s" if summary.sweeps and seconds > 0 else ""
    print(f"batch: {total} files: {len(summary.stored)} analysed ({summary.sweeps} sweeps), "
          f"{len(summary.skipped)} skipped, {len(summary.failed)} failed in {seconds:.1f} s{rate}")
    if metadata.unused():
        print(f"note: {metadata.unused()} metadata rows matched none of these files",
              file=sys.stderr)
    if summary.failed:
        print("failed files:", file=sys.stderr)
        for path, reason in summary.failed:
            print(f"  {path}: {reason}", file=sys.stderr)
