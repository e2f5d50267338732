"""Export: the store's traces (or corrected traces) back to SEG-Y.

Whole survey: one file, all traces in manifest order, with the first swath's
textual and binary headers and every trace's own raw header. Per swath: one
file per swath, each byte-identical to its input but for the samples (and
the format code when it changes). Output is big-endian unless asked
otherwise; a little-endian input is converted field by field.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Literal

from descatter.storage.segy_write import SegyWriter, swap_binary_header, swap_trace_headers
from descatter.storage.store import SurveyStore, SwathRecord
from descatter.tasks.errors import ConfigError, InputNotFoundError

log = logging.getLogger(__name__)

Progress = Callable[[int, int], None]


@dataclass
class ExportReport:
    files: list[Path]
    traces: int


def _headers_for(rec: SwathRecord, byte_order: str):
    if rec.byte_order == byte_order:
        return rec.binary, (lambda raw: raw)
    return swap_binary_header(rec.binary), swap_trace_headers


def _write_swaths(store: SurveyStore, records: list[SwathRecord], out: Path, *, array: str,
                  sample_format: str, byte_order: str, progress: Progress | None,
                  done: int, total: int) -> int:
    first = records[0]
    binary, _ = _headers_for(first, byte_order)
    with SegyWriter(
        out, textual=first.textual, extended_textual=first.extended_textual, binary=binary,
        n_samples=store.n_samples, sample_format=sample_format, byte_order=byte_order,
    ) as writer:
        for rec in records:
            _, convert = _headers_for(rec, byte_order)
            headers = store.array(rec.name, "trace_headers")
            for start, stop, samples in store.iter_blocks(rec.name, array):
                writer.write(convert(headers[start:stop]), samples)
                done += stop - start
                if progress:
                    progress(done, total)
    return done


def export_segy(
    store_path: str | Path,
    out: str | Path,
    *,
    array: Literal["traces", "corrected"] = "traces",
    sample_format: Literal["ieee", "ibm"] = "ieee",
    byte_order: Literal["big", "little"] = "big",
    per_swath: bool = False,
    progress: Progress | None = None,
) -> ExportReport:
    """Write SEG-Y from the store (reads only; takes no lock)."""
    store = SurveyStore.open(store_path)
    records = store.manifest()
    if not records:
        raise InputNotFoundError(f"{store.path}: the store has no committed swath to export")
    if array not in ("traces", "corrected"):
        raise ConfigError(f"--array {array!r}: expected 'traces' or 'corrected'")
    missing = [r.name for r in records if not (store.path / "swaths" / r.name / array / "zarr.json").is_file()]
    if missing:
        raise InputNotFoundError(
            f"{store.path}: swath(s) {', '.join(missing)} have no {array!r} array"
            + (" (run 'descatter apply' first)" if array == "corrected" else "")
        )
    total = sum(r.n_traces for r in records)
    out = Path(out)
    files: list[Path] = []
    if per_swath:
        out.mkdir(parents=True, exist_ok=True)
        done = 0
        for rec in records:
            path = out / f"{rec.name}.sgy"
            done = _write_swaths(store, [rec], path, array=array, sample_format=sample_format,
                                 byte_order=byte_order, progress=progress, done=done, total=total)
            files.append(path)
    else:
        _write_swaths(store, records, out, array=array, sample_format=sample_format,
                      byte_order=byte_order, progress=progress, done=0, total=total)
        files.append(out)
    log.info("exported %d traces to %s", total, ", ".join(map(str, files)))
    return ExportReport(files=files, traces=total)
