"""``descatter qc``: every flagged or excluded trace, one CSV row each."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from descatter.storage.stations import read_qc_flags
from descatter.storage.store import SurveyStore
from descatter.storage.tables import write_csv
from descatter.tasks.trace_qc import FLAG_BITS, flag_counts, join_flags

QC_COLUMNS = ("swath", "trace", "field_record", "channel", "flags")


def flagged_rows(store: SurveyStore):
    """(swath, trace, field_record, channel, flags) of every flagged trace,
    swaths in manifest order, traces in swath order."""
    for rec in store.manifest():
        flags = read_qc_flags(store, rec.name)
        hit = np.flatnonzero(flags)
        if not hit.size:
            continue
        h = store.headers(rec.name, ["field_record", "channel"])
        for i in hit:
            yield rec.name, int(i), int(h["field_record"][i]), int(h["channel"][i]), join_flags(int(flags[i]))


def write_qc_report(store_path: str | Path, out: str | Path) -> int:
    """Write the QC CSV; returns the number of flagged traces."""
    return write_csv(out, QC_COLUMNS, flagged_rows(SurveyStore.open(store_path)))


def qc_counts(store: SurveyStore) -> dict[str, dict[str, int]]:
    """Flag counts per swath: {swath: {flag: count}} (flags with a zero count left out)."""
    out = {}
    for rec in store.manifest():
        counts = flag_counts(read_qc_flags(store, rec.name))
        out[rec.name] = {k: v for k, v in counts.items() if v and k in FLAG_BITS}
    return out
