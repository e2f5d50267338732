"""Check an exported SEG-Y file against the store with an independent reader.

Samples are read with segyio (not our reader), trace headers as raw bytes
at the positions the SEG-Y rev 1 standard fixes (3600-byte file header,
extended textual headers, then 240-byte header + samples per trace).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from descatter.storage.store import SurveyStore


def compare_with_store(segy_path: str | Path, store_path: str | Path, *, array: str = "traces",
                       max_reports: int = 5) -> list[str]:
    """Differences between a big-endian whole-survey export and the store
    (empty when every sample and every trace header is equal)."""
    import segyio

    store = SurveyStore.open(store_path)
    records = store.manifest()
    problems: list[str] = []
    with segyio.open(str(segy_path), "r", ignore_geometry=True) as f:
        f.mmap()
        n_ext = int(f.bin[segyio.BinField.ExtendedHeaders])
        n_samples = len(f.samples)
        if f.tracecount != sum(r.n_traces for r in records):
            return [f"{segy_path}: {f.tracecount} traces, the store has {sum(r.n_traces for r in records)}"]
        samples = f.trace.raw[:]
    item = 4  # export writes formats 1 and 5 only, both 4-byte samples
    raw = np.memmap(segy_path, dtype=np.uint8, mode="r", offset=3600 + 3200 * n_ext)
    raw = raw.reshape(-1, 240 + n_samples * item)[:, :240]
    start = 0
    for rec in records:
        stop = start + rec.n_traces
        ours = store.array(rec.name, array)[:]
        if not np.array_equal(ours, samples[start:stop]):
            bad = np.flatnonzero(~np.all(ours == samples[start:stop], axis=1))
            problems.append(f"swath {rec.name}: samples differ at {len(bad)} traces, first {int(bad[0])}")
        headers = store.array(rec.name, "trace_headers")[:]
        if rec.byte_order == "big" and not np.array_equal(headers, raw[start:stop]):
            bad = np.flatnonzero(~np.all(headers == raw[start:stop], axis=1))
            problems.append(f"swath {rec.name}: trace headers differ at {len(bad)} traces, first {int(bad[0])}")
        start = stop
        if len(problems) >= max_reports:
            break
    return problems
