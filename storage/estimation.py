"""Estimation data in the survey store: spectra, statistics, solutions.

    <store>/swaths/<name>/spectra                 complex64 [n, n_freq], chunked like traces
    <store>/stats/<key>/<group>/<array>           partial sums of one swath (key = name) or
                                                  of a pair of swaths (key = "a+b")
    <store>/solutions/<id>/<array>                station filters and attributes;
                                                  attrs: effective config, code version
    root attrs "current_solution"                 the id of the current solution

Statistics and solutions are written whole by one writer. A solution id
sorts by creation time (``YYYYmmddTHHMMSS-<n>``).
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np
import zarr
import zarr.errors

from descatter.storage.store import SWATHS, SurveyStore, write_chunk
from descatter.tasks.errors import InputNotFoundError, StoreFormatError

STATS = "stats"
SOLUTIONS = "solutions"
# Spectra and pair sums are stored raw: blosc lz4 + shuffle made spectra only 1.08x and the
# pair sums of one swath 1.4x smaller, for 1.7x the write and 1.9x the read time (measured
# on the receiver pairs of a 50,000-trace swath, 49 MB: write 140 vs 83 ms, read 40 vs 21 ms).
_CODEC = ()


# -- spectra -------------------------------------------------------------

def create_spectra(store: SurveyStore, swath: str, *, n_traces: int, n_freq: int, chunk_traces: int) -> None:
    """(Re)create a swath's spectra array, chunked on the traces' boundaries."""
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}"]
    group.create_array("spectra", shape=(n_traces, n_freq), chunks=(max(1, min(chunk_traces, n_traces)), n_freq),
                       dtype="complex64", compressors=_CODEC, fill_value=0, overwrite=True,
                       dimension_names=["trace", "frequency"])


def spectra_shape(store: SurveyStore, swath: str) -> tuple[int, int] | None:
    if not (store.path / SWATHS / swath / "spectra" / "zarr.json").is_file():
        return None
    return tuple(store.array(swath, "spectra").shape)


def write_spectra_chunk(store_path: str | Path, swath: str, start: int, spectra: np.ndarray) -> None:
    write_chunk(store_path, swath, "spectra", start, spectra)


def read_spectra(store_path: str | Path, swath: str, rows: np.ndarray | slice) -> np.ndarray:
    """Spectra of the given trace rows (a slice or sorted int array; reads
    may cross chunk boundaries)."""
    arr = zarr.open_array(str(store_path), path=f"{SWATHS}/{swath}/spectra", mode="r")
    if isinstance(rows, slice):
        return arr[rows]
    rows = np.asarray(rows, np.int64)
    if rows.size == 0:
        return np.zeros((0, arr.shape[1]), np.complex64)
    lo, hi = int(rows.min()), int(rows.max()) + 1
    # one contiguous read of the covering range beats a scattered selection
    return arr[lo:hi][rows - lo]


# -- corrected traces ------------------------------------------------------

def create_corrected(store: SurveyStore, swath: str, *, settings: dict[str, Any]) -> None:
    """(Re)create a swath's corrected array like its traces, with the
    effective correction settings in its attributes, and beside it
    ``corrected_solution`` (int32 per trace: which of the attribute list
    ``solutions`` corrected it, -1 before any)."""
    traces = store.array(swath, "traces")
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}"]
    arr = group.create_array("corrected", shape=traces.shape, chunks=traces.chunks, dtype="float32",
                             compressors=traces.compressors, fill_value=0.0, overwrite=True,
                             dimension_names=["trace", "sample"])
    group.create_array("corrected_solution", shape=(traces.shape[0],), chunks=(traces.chunks[0],),
                       dtype="int32", fill_value=-1, overwrite=True, dimension_names=["trace"])
    arr.attrs.update({**settings, "solutions": []})


def corrected_settings(store: SurveyStore, swath: str) -> dict[str, Any] | None:
    if not (store.path / SWATHS / swath / "corrected" / "zarr.json").is_file():
        return None
    return dict(store.array(swath, "corrected").attrs)


def corrected_solution_index(store: SurveyStore, swath: str, solution_id: str) -> tuple[int, list[str]]:
    """Index of ``solution_id`` in the swath's list of correcting solutions,
    appended if new (by the single writer); returns it and the whole list."""
    arr = _corrected_array(store, swath)
    solutions = list(arr.attrs.get("solutions", []))
    if solution_id not in solutions:
        solutions.append(solution_id)
        arr.attrs.update({"solutions": solutions})
    return solutions.index(solution_id), solutions


def mark_corrected_solution(store: SurveyStore, swath: str, solution_id: str | None) -> None:
    """Record the solution the swath's corrected traces are up to date with
    (``None`` while a correction is under way). Single writer only."""
    _corrected_array(store, swath).attrs.update({"solution": solution_id})


def _corrected_array(store: SurveyStore, swath: str):
    return zarr.open_array(str(store.path), path=f"{SWATHS}/{swath}/corrected", mode="r+")


def write_corrected_chunk(store_path: str | Path, swath: str, start: int, samples: np.ndarray,
                          applied: np.ndarray) -> None:
    """A chunk of corrected samples, then which solution corrected each trace."""
    write_chunk(store_path, swath, "corrected", start, samples)
    write_chunk(store_path, swath, "corrected_solution", start, np.asarray(applied, np.int32))


def read_corrected_chunk(store_path: str | Path, swath: str, start: int, stop: int) -> tuple[np.ndarray, np.ndarray]:
    g = zarr.open_group(str(store_path), path=f"{SWATHS}/{swath}", mode="r")
    return g["corrected"][start:stop], g["corrected_solution"][start:stop]


def write_stats(store_path: str | Path, key: str, group: str, arrays: dict[str, np.ndarray]) -> None:
    """Write one statistics group whole (``stats/<key>/<group>/*``),
    replacing what was there."""
    root = _require(zarr.open_group(str(store_path), mode="r+"), STATS)
    root = _require(root, key)
    if group in root:
        del root[group]
    g = root.create_group(group)
    _write_arrays(g, arrays)


def _write_arrays(group, arrays: dict[str, np.ndarray]) -> None:
    """Each array whole, one chunk (0-d values are stored with shape (1,))."""
    for name, values in arrays.items():
        values = np.atleast_1d(np.asarray(values))
        group.create_array(name, shape=values.shape, chunks=tuple(max(1, s) for s in values.shape),
                           dtype=values.dtype, compressors=_CODEC, fill_value=0)[...] = values


def _require(parent, name: str):
    """require_group that tolerates a concurrent writer creating the same
    parent group (statistics of different keys are written in parallel)."""
    try:
        return parent.require_group(name)
    except zarr.errors.ContainsGroupError:
        return parent[name]


def read_stats(store_path: str | Path, key: str, group: str,
               names: tuple[str, ...] | None = None) -> dict[str, np.ndarray]:
    """The arrays of one statistics group (only ``names`` when given)."""
    path = Path(store_path) / STATS / key / group
    if not (path / "zarr.json").is_file():
        raise InputNotFoundError(f"{store_path}: no statistics {key}/{group} (run 'descatter estimate')")
    g = zarr.open_group(str(store_path), path=f"{STATS}/{key}/{group}", mode="r")
    if names is not None:
        return {name: g[name][...] for name in names}
    return {name: arr[...] for name, arr in g.arrays()}


def has_stats(store_path: str | Path, key: str, group: str) -> bool:
    return (Path(store_path) / STATS / key / group / "zarr.json").is_file()


def stats_keys(store_path: str | Path) -> list[str]:
    root = Path(store_path) / STATS
    return sorted(p.name for p in root.iterdir() if p.is_dir()) if root.is_dir() else []


def remove_stats_naming(store_path: str | Path, swath: str) -> list[str]:
    """Delete every statistics key that names ``swath`` (its own and its
    cross-swath pairs); returns the keys removed."""
    removed = []
    for key in stats_keys(store_path):
        if swath in key.split("+"):
            shutil.rmtree(Path(store_path) / STATS / key)
            removed.append(key)
    return removed


# -- solutions -----------------------------------------------------------

def new_solution_id(store: SurveyStore) -> str:
    stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime())
    existing = [s for s in list_solutions(store) if s.startswith(stamp)]
    return f"{stamp}-{len(existing):02d}"


def write_solution(store: SurveyStore, arrays: dict[str, np.ndarray], attrs: dict[str, Any],
                   *, make_current: bool = True) -> str:
    """Write a solution under a new id, then (last) name it current."""
    sid = new_solution_id(store)
    root = zarr.open_group(str(store.path), mode="r+").require_group(SOLUTIONS)
    g = root.create_group(sid)
    _write_arrays(g, arrays)
    g.attrs.update({**attrs, "id": sid, "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())})
    if make_current:
        store.set_attrs(current_solution=sid)
    return sid


def list_solutions(store: SurveyStore) -> list[str]:
    root = store.path / SOLUTIONS
    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir() if (p / "zarr.json").is_file())


def solution_attrs(store: SurveyStore, sid: str) -> dict[str, Any]:
    return dict(zarr.open_group(str(store.path), path=f"{SOLUTIONS}/{sid}", mode="r").attrs)


def read_solution(store: SurveyStore, sid: str | None = None, *,
                  names: tuple[str, ...] | None = None) -> tuple[str, dict[str, np.ndarray], dict[str, Any]]:
    """(id, arrays, attrs) of a solution; the current one by default; only
    the arrays in ``names`` when given."""
    sid = sid or store.attrs.get("current_solution")
    if not sid:
        raise InputNotFoundError(f"{store.path}: no solution yet (run 'descatter estimate')")
    if sid not in list_solutions(store):
        known = ", ".join(list_solutions(store)) or "none"
        raise StoreFormatError(f"{store.path}: no solution {sid!r} (solutions: {known})")
    g = zarr.open_group(str(store.path), path=f"{SOLUTIONS}/{sid}", mode="r")
    if names is not None:
        return sid, {name: g[name][...] for name in names}, dict(g.attrs)
    return sid, {name: arr[...] for name, arr in g.arrays()}, dict(g.attrs)
