"""``descatter stations``: a solution's stations as CSV, or filters as .npz."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from descatter.storage.arrays_file import write_arrays
from descatter.storage.estimation import read_solution
from descatter.storage.stations import read_stations
from descatter.storage.store import SurveyStore
from descatter.storage.tables import write_csv

STATION_COLUMNS = ("kind", "station", "x", "y", "elevation", "static_ms", "amplitude_db", "scattering_fraction",
                   "coherence", "pairs", "residual", "component", "identity")
KINDS = (("source", "sources"), ("receiver", "receivers"))


def _ordered(store: SurveyStore, arrays: dict):
    """Per kind: (table, order by station id, the solution's arrays)."""
    for kind, table_name in KINDS:
        table = read_stations(store, table_name)
        n = len(arrays[f"{kind}_pairs"])
        table = {k: v[:n] for k, v in table.items()}
        yield kind, table, np.argsort(table["key"], kind="stable")


def station_rows(store: SurveyStore, arrays: dict):
    for kind, table, order in _ordered(store, arrays):
        a = {c: arrays[f"{kind}_{c}"] for c in STATION_COLUMNS[5:]}
        for i in order:
            yield (kind, int(table["key"][i]), f"{table['x'][i]:.3f}", f"{table['y'][i]:.3f}",
                   f"{table['elevation'][i]:.3f}", f"{a['static_ms'][i]:.4f}", f"{a['amplitude_db'][i]:.4f}",
                   f"{a['scattering_fraction'][i]:.4f}", f"{a['coherence'][i]:.4f}", int(a["pairs"][i]),
                   f"{a['residual'][i]:.5f}", int(a["component"][i]), "true" if a["identity"][i] else "false")


def write_station_table(store_path: str | Path, out: str | Path, *, solution: str | None = None) -> tuple[str, int]:
    store = SurveyStore.open(store_path)
    sid, arrays, _ = read_solution(store, solution)
    return sid, write_csv(out, STATION_COLUMNS, station_rows(store, arrays))


def write_filters(store_path: str | Path, out: str | Path, *, solution: str | None = None) -> tuple[str, int]:
    """filters.npz: kind, station, x, y, freq_hz, response, filter, dt_s."""
    store = SurveyStore.open(store_path)
    sid, arrays, attrs = read_solution(store, solution)
    parts = {k: [] for k in ("kind", "station", "x", "y", "response", "filter")}
    for kind, table, order in _ordered(store, arrays):
        parts["kind"].append(np.full(len(order), kind))
        parts["station"].append(table["key"][order])
        parts["x"].append(table["x"][order])
        parts["y"].append(table["y"][order])
        parts["response"].append(arrays[f"{kind}_response"][order])
        parts["filter"].append(arrays[f"{kind}_filter"][order])
    out_arrays = {k: np.concatenate(v) for k, v in parts.items()}
    out_arrays["freq_hz"] = arrays["freq_hz"]
    out_arrays["dt_s"] = np.float64(attrs["dt_s"])
    write_arrays(out, out_arrays)
    return sid, len(out_arrays["station"])
