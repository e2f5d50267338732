"""Export: the store's traces (or corrected traces) back to SEG-Y.

Whole survey: one file, all traces in manifest order, with the first swath's
textual and binary headers and every trace's own raw header. Per swath: one
file per swath, each byte-identical to its input but for the samples (and
the format code when it changes). Output is big-endian unless asked
otherwise; a little-endian input is converted field by field.
"""

from __future__ import annotations

import logging
import os
import threading
from concurrent.futures import ThreadPoolExecutor
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
                  sample_format: str, byte_order: str, progress: Callable[[int], None] | None) -> None:
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
                if progress:
                    progress(stop - start)


def export_segy(
    store_path: str | Path,
    out: str | Path,
    *,
    array: Literal["traces", "corrected"] = "traces",
    sample_format: Literal["ieee", "ibm"] = "ieee",
    byte_order: Literal["big", "little"] = "big",
    per_swath: bool = False,
    progress: Progress | None = None,
    threads: int | None = None,
) -> ExportReport:
    """Write SEG-Y from the store (reads only; takes no lock).

    Per swath, ``threads`` files are written at once (default: one per core,
    at most 4): reading, encoding, writing and the closing fsync release the
    GIL (on 2 cores, 10 swaths of 20,096 traces, six runs each: two writers
    0.47-0.52 s, one 0.55-0.93 s). No cluster: export stays a plain read of
    the store."""
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
    lock = threading.Lock()
    done = 0

    def advance(n: int) -> None:
        nonlocal done
        with lock:
            done += n
            if progress:
                progress(done, total)

    options = dict(array=array, sample_format=sample_format, byte_order=byte_order, progress=advance)
    if per_swath:
        out.mkdir(parents=True, exist_ok=True)
        files = [out / f"{rec.name}.sgy" for rec in records]
        n_threads = threads or min(4, os.cpu_count() or 1)
        with ThreadPoolExecutor(max_workers=max(1, n_threads)) as pool:
            for f in [pool.submit(_write_swaths, store, [rec], path, **options) for rec, path in zip(records, files)]:
                f.result()  # the first error in swath order; the pool lets the other writers finish
    else:
        _write_swaths(store, records, out, **options)
        files = [out]
    log.info("exported %d traces to %s", total, ", ".join(map(str, files)))
    return ExportReport(files=files, traces=total)
