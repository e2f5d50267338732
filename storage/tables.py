"""Plain-text tables a user opens in a spreadsheet: CSV, written atomically."""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Iterable, Sequence

from descatter.storage.atomic import write_bytes_atomic


def write_csv(path: str | Path, columns: Sequence[str], rows: Iterable[Sequence[object]]) -> int:
    """Write a header row and ``rows`` to ``path`` (temporary file, then
    rename); returns the number of data rows."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    n = 0
    for row in rows:
        writer.writerow(row)
        n += 1
    write_bytes_atomic(Path(path), buf.getvalue().encode(), durable=False)
    return n


def read_csv(path: str | Path) -> tuple[list[str], list[list[str]]]:
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]
