"""Station tables and per-trace geometry in the survey store.

    <store>/geometry/sources/{key,x,y,elevation}     [n_sources], append only
    <store>/geometry/receivers/{key,x,y,elevation}   [n_receivers], append only
    <store>/swaths/<name>/geometry/<field>           [n], chunked like traces
    <store>/swaths/<name>/qc_flags                   uint16 [n], bits of tasks.trace_qc.FLAG_BITS

Station tables grow by resize-then-write, which publishes the new length
before the rows are written; readers therefore only trust the committed
length kept in the manifest (:meth:`SurveyStore.station_counts`), which the
single writer advances when it commits the swath that added the rows.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import zarr
from zarr.codecs import BloscCodec

from descatter.storage.store import SWATHS, SurveyStore, writer_chunk

KINDS = ("sources", "receivers")
STATION_FIELDS = {"key": "int64", "x": "float64", "y": "float64", "elevation": "float64"}
GEOMETRY_FIELDS = {
    "source_index": "int64", "receiver_index": "int64", "shot": "int64",
    "source_x": "float64", "source_y": "float64", "receiver_x": "float64", "receiver_y": "float64",
    "offset": "float64", "azimuth": "float64", "cmp_x": "float64", "cmp_y": "float64",
}
_CODEC = (BloscCodec(cname="zstd", clevel=3, shuffle="shuffle"),)
_TABLE_CHUNK = 65536


def _check_kind(kind: str) -> None:
    if kind not in KINDS:
        raise ValueError(f"station kind {kind!r}: expected one of {KINDS}")


def read_stations(store: SurveyStore, kind: str, n: int | None = None) -> dict[str, np.ndarray]:
    """The first ``n`` rows (default: the committed length) of a station table."""
    _check_kind(kind)
    n = store.station_counts()[kind] if n is None else n
    root = store.path / "geometry" / kind
    if n == 0 or not (root / "key" / "zarr.json").is_file():
        return {f: np.zeros(0, dtype=d) for f, d in STATION_FIELDS.items()}
    out = {}
    for field in STATION_FIELDS:
        arr = zarr.open_array(str(store.path), path=f"geometry/{kind}/{field}", mode="r")
        out[field] = arr[:n]
    return out


def write_stations(store: SurveyStore, kind: str, rows: dict[str, np.ndarray], *, start: int) -> int:
    """Write ``rows`` as table rows ``start, start+1, ...`` (after the
    committed length), growing the table; returns the new length. Rows past
    the committed length left by a killed writer are overwritten."""
    _check_kind(kind)
    n_new = len(rows["key"])
    group = zarr.open_group(str(store.path), mode="r+").require_group("geometry").require_group(kind)
    for field, dtype in STATION_FIELDS.items():
        if field not in group:
            group.create_array(field, shape=(0,), chunks=(_TABLE_CHUNK,), dtype=dtype,
                               compressors=_CODEC, fill_value=0, dimension_names=["station"])
        arr = group[field]
        arr.resize((start + n_new,))
        if n_new:
            arr[start:start + n_new] = np.asarray(rows[field], dtype=dtype)
    return start + n_new


def write_swath_geometry(store: SurveyStore, swath: str, arrays: dict[str, np.ndarray], *,
                         chunk_traces: int) -> None:
    """Write a staged swath's per-trace geometry arrays (whole, by the writer)."""
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}"].require_group("geometry")
    for field, dtype in GEOMETRY_FIELDS.items():
        values = np.asarray(arrays[field], dtype=dtype)
        arr = group.create_array(field, shape=values.shape, chunks=(writer_chunk(chunk_traces, len(values)),),
                                 dtype=dtype, compressors=_CODEC, fill_value=0, overwrite=True,
                                 dimension_names=["trace"])
        arr[:] = values


def read_swath_geometry(store: SurveyStore, swath: str, fields: list[str] | None = None) -> dict[str, np.ndarray]:
    names = fields or list(GEOMETRY_FIELDS)
    return {f: store.array(swath, f"geometry/{f}")[:] for f in names}


def write_qc_flags(store: SurveyStore, swath: str, flags: np.ndarray) -> None:
    arr = zarr.open_array(str(store.path), path=f"{SWATHS}/{swath}/qc_flags", mode="r+")
    arr[:] = np.asarray(flags, dtype=np.uint16)


def read_qc_flags(store: SurveyStore, swath: str) -> np.ndarray:
    return store.array(swath, "qc_flags")[:]


def has_geometry(store_path: str | Path, swath: str) -> bool:
    return (Path(store_path) / SWATHS / swath / "geometry" / "shot" / "zarr.json").is_file()
