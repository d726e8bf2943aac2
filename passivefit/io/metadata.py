"""Cell metadata sheets: a CSV with a `file` column and the cell columns of the schema.

Any problem with the sheet is one `MetadataError` line naming the row and the fix.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from passivefit.model.errors import InputError
from passivefit.model.schema import METADATA_KEYS

METADATA_COLUMNS = ("file", *METADATA_KEYS)


class MetadataError(InputError):
    """A metadata sheet that cannot be used as it is."""


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
    """Read and check a metadata CSV; any problem is a one-line MetadataError.

    The CSV has a header row with a ``file`` column (a file name, or a path relative
    to the CSV's folder, or an absolute path) and any of the cell columns
    ``cell_id, date (YYYY-MM-DD), preparation, region, cell_type, temperature_C,
    internal_solution, notes``. Empty cells mean "not known".
    """
    import csv
    from datetime import date

    source = Path(path)
    where = f"`--metadata` {path}"
    try:
        with open(source, newline="", encoding="utf-8-sig") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise MetadataError(f"{where}: cannot read it ({exc})") from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise MetadataError(f"{where}: the file is empty; give a header row such as "
                         "file,cell_id,region")
    header = [h.strip() for h in rows[0]]
    unknown = [h for h in header if h not in METADATA_COLUMNS]
    if unknown:
        raise MetadataError(f"{where}: unknown column(s) {', '.join(map(repr, unknown))}; "
                         f"allowed: {', '.join(METADATA_COLUMNS)}")
    if "file" not in header or len(set(header)) != len(header):
        raise MetadataError(f"{where}: the header needs one `file` column and no repeated "
                         f"names (found {', '.join(header)})")
    table = MetadataTable()
    for line, raw in enumerate(rows[1:], start=2):
        if len(raw) != len(header):
            raise MetadataError(f"{where} row {line}: {len(raw)} fields, the header has "
                             f"{len(header)}; quote values that contain commas")
        row = {h: v.strip() or None for h, v in zip(header, raw, strict=True)}
        if not row["file"]:
            raise MetadataError(f"{where} row {line}: the `file` cell is empty")
        if row.get("temperature_C") is not None:
            try:
                row["temperature_C"] = float(row["temperature_C"])
            except ValueError:
                raise MetadataError(f"{where} row {line}: temperature_C {row['temperature_C']!r} "
                                 "is not a number; give degrees Celsius, e.g. 32") from None
        if row.get("date") is not None:
            try:
                date.fromisoformat(row["date"])
            except ValueError:
                raise MetadataError(f"{where} row {line}: date {row['date']!r} is not "
                                 "YYYY-MM-DD, e.g. 2026-11-03") from None
        resolved = str((source.parent / row["file"]).resolve())
        if resolved in table.by_path:
            raise MetadataError(f"{where} row {line}: {row['file']!r} is listed twice")
        table.by_path[resolved] = row
        if "/" not in row["file"] and "\\" not in row["file"]:
            table.by_name.setdefault(row["file"], row)
    return table
