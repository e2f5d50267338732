"""The QC report folder: PNG figures, the HTML page and metrics.json.

    <outdir>/index.html        the page (refers to the figures by file name)
    <outdir>/<figure>.png      one file per figure
    <outdir>/metrics.json      every number behind every figure

Each file is written whole to a temporary name beside it and renamed
(:func:`~descatter.storage.atomic.write_bytes_atomic`), so a reader sees
the old file or the new one. metrics.json is strict JSON: numpy values
become plain numbers and lists, and a non-finite number becomes ``null``.
"""

from __future__ import annotations

import io
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from descatter.storage.atomic import write_bytes_atomic
from descatter.tasks.errors import StoreFormatError

PAGE_NAME = "index.html"
METRICS_NAME = "metrics.json"


def plain(value: Any) -> Any:
    """``value`` as plain JSON types: dicts, lists, str, int, float, bool,
    None; numpy scalars and arrays converted, NaN and infinities as None."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return plain(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, Path):
        return str(value)
    if value is None or isinstance(value, str):
        return value
    raise TypeError(f"cannot write {type(value).__name__} to metrics.json")


class ReportFolder:
    """The folder one report is written into (created if missing)."""

    def __init__(self, outdir: str | Path):
        self.path = Path(outdir)
        if self.path.exists() and not self.path.is_dir():
            raise StoreFormatError(f"{self.path}: exists and is not a folder; give a folder for the report")
        if (self.path / "zarr.json").is_file():
            raise StoreFormatError(f"{self.path}: is a zarr store; write the report to a folder of its own")
        self.path.mkdir(parents=True, exist_ok=True)

    def write_figure(self, name: str, figure, *, dpi: int = 110) -> Path:
        """Render a matplotlib Figure (Agg) to ``<name>.png``; returns the path."""
        buf = io.BytesIO()
        figure.savefig(buf, format="png", dpi=dpi)
        path = self.path / f"{name}.png"
        write_bytes_atomic(path, buf.getvalue(), durable=False)
        return path

    def write_page(self, text: str, *, name: str = PAGE_NAME) -> Path:
        path = self.path / name
        write_bytes_atomic(path, text.encode("utf-8"), durable=False)
        return path

    def write_metrics(self, document: dict[str, Any], *, name: str = METRICS_NAME) -> Path:
        path = self.path / name
        text = json.dumps(plain(document), indent=1, allow_nan=False)
        write_bytes_atomic(path, (text + "\n").encode("utf-8"), durable=False)
        return path


def read_metrics(outdir: str | Path) -> dict[str, Any]:
    with open(Path(outdir) / METRICS_NAME, "rb") as fh:
        return json.loads(fh.read())
