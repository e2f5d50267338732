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

from descatter.storage.store import SWATHS, SurveyStore, write_whole_arrays, writer_chunk

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


def read_stations(store: SurveyStore, kind: str, n: int | None = None,
                  fields: tuple[str, ...] | None = None) -> dict[str, np.ndarray]:
    """The first ``n`` rows (default: the committed length) of a station
    table, every field or only ``fields``.

    Rows below the committed length are never rewritten in place (the
    writer only appends, and zarr replaces a chunk file atomically), so a
    worker may read them while the writer appends rows of another swath.
    """
    _check_kind(kind)
    n = store.station_counts()[kind] if n is None else n
    names = tuple(STATION_FIELDS) if fields is None else tuple(fields)
    root = store.path / "geometry" / kind
    if n == 0 or not (root / "key" / "zarr.json").is_file():
        return {f: np.zeros(0, dtype=STATION_FIELDS[f]) for f in names}
    out = {}
    for field in names:
        arr = zarr.open_array(str(store.path), path=f"geometry/{kind}/{field}", mode="r")
        out[field] = arr[:n]
    return out


def write_stations(store: SurveyStore, kind: str, rows: dict[str, np.ndarray], *, start: int) -> int:
    """Write ``rows`` as table rows ``start, start+1, ...`` (after the
    committed length), growing the table; returns the new length. Rows past
    the committed length left by a killed writer are overwritten."""
    return StationAppender(store).append(kind, rows, start=start)


class StationAppender:
    """The writer's open handles on the station tables, for appending the
    new stations of one swath after another (:func:`write_stations` each
    time, without reopening the arrays: about a quarter of its cost,
    measured). Only the lock holder appends, so the handles stay current."""

    def __init__(self, store: SurveyStore):
        self.store = store
        self._arrays: dict[str, dict[str, zarr.Array]] = {}

    def _open(self, kind: str) -> dict[str, zarr.Array]:
        if kind not in self._arrays:
            group = zarr.open_group(str(self.store.path), mode="r+").require_group("geometry").require_group(kind)
            arrays = {}
            for field, dtype in STATION_FIELDS.items():
                if field not in group:
                    group.create_array(field, shape=(0,), chunks=(_TABLE_CHUNK,), dtype=dtype,
                                       compressors=_CODEC, fill_value=0, dimension_names=["station"])
                arrays[field] = group[field]
            self._arrays[kind] = arrays
        return self._arrays[kind]

    def append(self, kind: str, rows: dict[str, np.ndarray], *, start: int) -> int:
        """Write ``rows`` as rows ``start, start+1, ...``; returns the new length."""
        _check_kind(kind)
        n_new = len(rows["key"])
        for field, arr in self._open(kind).items():
            if arr.shape != (start + n_new,):
                arr.resize((start + n_new,))
            if n_new:
                arr[start:start + n_new] = np.asarray(rows[field], dtype=STATION_FIELDS[field])
        return start + n_new


def write_swath_geometry(store: SurveyStore, swath: str, arrays: dict[str, np.ndarray], *,
                         chunk_traces: int) -> None:
    """Write a staged swath's per-trace geometry arrays (whole, by the writer)."""
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}"].require_group("geometry")
    n = len(arrays["shot"])
    write_whole_arrays(group, {f: arrays[f] for f in GEOMETRY_FIELDS}, dtypes=GEOMETRY_FIELDS,
                       chunks=writer_chunk(chunk_traces, n), compressors=_CODEC)


def renumber_stations(store: SurveyStore, swath: str, field: str, *, first: int,
                      index: np.ndarray) -> None:
    """Re-point a staged swath's per-trace station indices: each value ``i >=
    first`` of ``geometry/<field>`` becomes ``index[i - first]`` (values
    below ``first``, and -1 for no station, stay). In place, by the writer.

    The swath's geometry is built on a worker against the table as it stood
    when the ingest began; stations that an earlier swath of the same ingest
    appended since then get their final rows here.
    """
    arr = zarr.open_array(str(store.path), path=f"{SWATHS}/{swath}/geometry/{field}", mode="r+")
    values = arr[:]
    moved = values >= first
    values[moved] = np.asarray(index, dtype=values.dtype)[values[moved] - first]
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
