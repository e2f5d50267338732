"""The survey store: a zarr v3 hierarchy with one group per swath.

Layout (all names are ours; any zarr v3 client can read them)::

    <store>/zarr.json                    root group; attrs: format, version,
                                         sampling, units, ingest config
    <store>/manifest.json                the commit record: swaths in order
    <store>/swaths/<name>/traces         float32 [n, n_samples]
    <store>/swaths/<name>/trace_headers  uint8 [n, 240], raw, file byte order
    <store>/swaths/<name>/headers/<f>    int32 or float64 [n], decoded fields
    <store>/checkpoints/...              done-flags (see checkpoints.py)
    <store>/runlog.jsonl, lock.json      run log and writer lock

Commit protocol: a swath's arrays are written first, under its group; the
swath exists for readers only once the single writer has rewritten
``manifest.json`` atomically with it. A group not named in the manifest is
staging (a running or killed ingest) and readers never look at it. Neither
consolidated metadata, array attributes nor chunk existence is used as
commit state (zarr skips all-fill chunks, and attributes lose concurrent
updates).
"""

from __future__ import annotations

import base64
import logging
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import zarr
from zarr.codecs import BloscCodec

from descatter.storage.atomic import read_json, write_json_atomic
from descatter.tasks.errors import InputNotFoundError, StoreFormatError, SwathConflictError

log = logging.getLogger(__name__)

FORMAT_NAME = "descatter-survey"
FORMAT_VERSION = 1
MANIFEST_NAME = "manifest.json"
MANIFEST_FORMAT = "descatter-manifest"

SWATHS = "swaths"
# Store every chunk, also all-fill ones: skipping them costs a full compare
# per chunk (measured: 21 ms -> 8.5 ms per 6 MB chunk without it) and would
# make a written chunk indistinguishable from a missing one. A runtime
# setting, not stored metadata, so it is set wherever storage is imported.
zarr.config.set({"array.write_empty_chunks": True})

# Header bytes are kept raw; they compress well with zstd and are read rarely.
# Level 1, not 3: on a swath's raw and decoded headers and QC flags (50,240
# traces) 23.5x smaller against 29.4x, in 26 instead of 88 ms; a 4,000-trace
# chunk of raw headers written in 3.0 instead of 8.1 ms (both measured, same
# ratio 23 on the chunk).
_HEADER_CODEC = BloscCodec(cname="zstd", clevel=1, shuffle="noshuffle")


def _sample_codec(level: int) -> tuple:
    # blosc lz4 + shuffle: about 1.14x on band-limited float32 at > 1 GB/s
    # encode (measured, DESIGN section 6); level 0 stores raw samples.
    if level <= 0:
        return ()
    return (BloscCodec(cname="lz4", clevel=level, shuffle="shuffle"),)


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def _unb64(text: str) -> bytes:
    return base64.b64decode(text.encode("ascii"))


@dataclass(frozen=True)
class SwathRecord:
    """One committed swath as the manifest records it."""

    name: str
    file: str
    size: int
    fingerprint: str
    quick_fingerprint: str
    n_traces: int
    chunk_traces: int
    byte_order: str
    format_code: int
    textual_encoding: str
    measurement_system: int
    textual: bytes
    extended_textual: bytes
    binary: bytes
    committed_at: str
    state: str = "committed"

    def to_json(self) -> dict[str, Any]:
        doc = {k: getattr(self, k) for k in self.__dataclass_fields__}
        for key in ("textual", "extended_textual", "binary"):
            doc[key] = _b64(doc[key])
        return doc

    @classmethod
    def from_json(cls, doc: dict[str, Any]) -> "SwathRecord":
        doc = dict(doc)
        for key in ("textual", "extended_textual", "binary"):
            doc[key] = _unb64(doc[key])
        return cls(**doc)

    def chunk_bounds(self) -> list[tuple[int, int]]:
        """``[(start, stop), ...]`` of every chunk of this swath's per-trace arrays."""
        return chunk_bounds(self.n_traces, self.chunk_traces)


def writer_chunk(chunk_traces: int, n_traces: int) -> int:
    """Chunk length of per-trace arrays written whole by the single writer
    (decoded headers, geometry): a multiple of the task chunk, so a task's
    trace range never straddles two of them more than it must, and large
    enough that zarr's per-chunk cost (about 2.5 ms, measured) is paid
    rarely: 16 header fields of a 50,000-trace swath took 2.0 s in chunks of
    1,000 traces."""
    return max(1, min(n_traces, chunk_traces * max(1, 65536 // chunk_traces)))


def chunk_bounds(n_traces: int, chunk_traces: int) -> list[tuple[int, int]]:
    """Trace ranges of consecutive chunks of ``chunk_traces`` (last one short)."""
    return [(a, min(a + chunk_traces, n_traces)) for a in range(0, n_traces, chunk_traces)]


class SurveyStore:
    """A handle on one survey store. Cheap to create; pass its ``path`` to
    workers and reopen there (zarr handles are not shared across processes)."""

    def __init__(self, path: Path, group: zarr.Group):
        self.path = Path(path)
        self._group = group

    # -- opening -----------------------------------------------------------
    @classmethod
    def open(cls, path: str | Path, *, writable: bool = False) -> "SurveyStore":
        """Open an existing store; :class:`StoreFormatError` if it is not ours."""
        path = Path(path)
        if not path.exists():
            raise InputNotFoundError(f"{path}: no such survey store (create one with 'descatter ingest')")
        if not (path / "zarr.json").is_file():
            raise StoreFormatError(f"{path}: not a descatter survey store (no zarr.json at its root)")
        try:
            group = zarr.open_group(str(path), mode="r+" if writable else "r")
        except Exception as exc:  # zarr raises several kinds for foreign data
            raise StoreFormatError(f"{path}: not a readable zarr v3 group ({exc})") from exc
        attrs = dict(group.attrs)
        if attrs.get("format") != FORMAT_NAME:
            raise StoreFormatError(
                f"{path}: a zarr group but not a descatter survey store "
                f"(format attribute {attrs.get('format')!r}, expected {FORMAT_NAME!r})"
            )
        version = attrs.get("format_version")
        if not isinstance(version, int) or version > FORMAT_VERSION:
            raise StoreFormatError(
                f"{path}: store format version {version!r} is newer than this "
                f"descatter reads ({FORMAT_VERSION}); upgrade descatter"
            )
        return cls(path, group)

    @classmethod
    def open_or_create(cls, path: str | Path) -> "SurveyStore":
        """Open the store at ``path``, creating an empty one if nothing is there.

        An existing non-empty folder that is not a store is refused rather
        than written into.
        """
        path = Path(path)
        # The writer takes the lock (a file in the store folder) first.
        if path.exists() and any(p.name != "lock.json" for p in path.iterdir()):
            return cls.open(path, writable=True)
        if path.exists() and not path.is_dir():
            raise StoreFormatError(f"{path}: exists and is not a folder")
        group = zarr.open_group(str(path), mode="a")
        group.attrs.update(
            {
                "format": FORMAT_NAME,
                "format_version": FORMAT_VERSION,
                "n_samples": None,
                "sample_interval_s": None,
                "units": {"time": "s", "coordinates": "m", "samples": "as recorded"},
                "ingest_config": None,
            }
        )
        write_json_atomic(path / MANIFEST_NAME, {"format": MANIFEST_FORMAT, "version": 1,
                                                 "stations": {"sources": 0, "receivers": 0}, "swaths": []})
        log.info("created survey store %s", path)
        return cls(path, group)

    # -- root attributes ---------------------------------------------------
    @property
    def attrs(self) -> dict[str, Any]:
        return dict(zarr.open_group(str(self.path), mode="r").attrs)

    @property
    def n_samples(self) -> int | None:
        return self.attrs.get("n_samples")

    @property
    def sample_interval_s(self) -> float | None:
        return self.attrs.get("sample_interval_s")

    def set_attrs(self, **values: Any) -> None:
        """Update root attributes. Single writer only (the lock holder)."""
        self._group.attrs.update(values)

    # -- manifest ----------------------------------------------------------
    def _manifest_doc(self) -> dict[str, Any]:
        doc = read_json(self.path / MANIFEST_NAME)
        if doc.get("format") != MANIFEST_FORMAT:
            raise StoreFormatError(f"{self.path / MANIFEST_NAME}: not a descatter manifest")
        return doc

    def manifest(self) -> list[SwathRecord]:
        """Committed swaths in manifest order (fresh from disk)."""
        return [SwathRecord.from_json(s) for s in self._manifest_doc()["swaths"]]

    def station_counts(self) -> dict[str, int]:
        """Committed length of the source and receiver station tables: rows
        past it belong to an uncommitted swath and are ignored."""
        counts = self._manifest_doc().get("stations", {})
        return {"sources": int(counts.get("sources", 0)), "receivers": int(counts.get("receivers", 0))}

    def swath(self, name: str) -> SwathRecord:
        for rec in self.manifest():
            if rec.name == name:
                return rec
        names = ", ".join(r.name for r in self.manifest()) or "none"
        raise SwathConflictError(f"{self.path}: no committed swath {name!r} (swaths: {names})")

    def swath_names(self) -> list[str]:
        return [r.name for r in self.manifest()]

    def commit_swath(self, record: SwathRecord, *, stations: dict[str, int] | None = None) -> None:
        """Publish a fully written swath: rewrite the manifest atomically with
        it appended (and the station tables' new committed lengths)."""
        records = self.manifest()
        if any(r.name == record.name for r in records):
            raise SwathConflictError(f"{self.path}: swath {record.name!r} is already committed")
        records.append(record)
        self._write_manifest(records, stations or self.station_counts())
        log.info("committed swath %s (%d traces)", record.name, record.n_traces)

    def drop_from_manifest(self, name: str) -> None:
        """Unpublish a committed swath: rewrite the manifest atomically
        without it (the first step of removing it; see storage.swath_removal)."""
        records = self.manifest()
        if not any(r.name == name for r in records):
            raise SwathConflictError(f"{self.path}: no committed swath {name!r}")
        self._write_manifest([r for r in records if r.name != name], self.station_counts())
        log.info("removed swath %s from the manifest", name)

    def set_station_counts(self, stations: dict[str, int]) -> None:
        """Commit new station-table lengths (after a geometry rebuild)."""
        self._write_manifest(self.manifest(), stations)

    def _write_manifest(self, records: list[SwathRecord], stations: dict[str, int]) -> None:
        write_json_atomic(
            self.path / MANIFEST_NAME,
            {"format": MANIFEST_FORMAT, "version": 1, "stations": stations,
             "swaths": [r.to_json() for r in records]},
        )

    # -- swath arrays ------------------------------------------------------
    def _swath_path(self, name: str) -> str:
        return f"{SWATHS}/{name}"

    def has_swath_group(self, name: str) -> bool:
        return (self.path / SWATHS / name / "zarr.json").is_file()

    def drop_swath_group(self, name: str) -> None:
        """Delete a swath's group. Refused for a committed swath (remove it
        from the manifest first); used to discard a staged, failed ingest."""
        if name in self.swath_names():
            raise SwathConflictError(f"{self.path}: refusing to delete committed swath {name!r}")
        shutil.rmtree(self.path / SWATHS / name, ignore_errors=True)

    def create_swath_arrays(
        self,
        name: str,
        *,
        n_traces: int,
        n_samples: int,
        chunk_traces: int,
        header_dtypes: dict[str, str],
        compression_level: int = 0,
    ) -> None:
        """Create (or recreate) the staging arrays of one swath, all chunked
        on the same trace boundaries so one task writes one chunk of each."""
        if name in self.swath_names():
            raise SwathConflictError(f"{self.path}: swath {name!r} is already committed")
        group = self._group.require_group(SWATHS).require_group(name)
        chunks = max(1, min(chunk_traces, n_traces))
        group.create_array(
            "traces", shape=(n_traces, n_samples), chunks=(chunks, n_samples), dtype="float32",
            compressors=_sample_codec(compression_level), fill_value=0.0, overwrite=True,
            dimension_names=["trace", "sample"],
        )
        group.create_array(
            "trace_headers", shape=(n_traces, 240), chunks=(chunks, 240), dtype="uint8",
            compressors=(_HEADER_CODEC,), fill_value=0, overwrite=True,
            dimension_names=["trace", "byte"],
        )
        group.create_array(
            "qc_flags", shape=(n_traces,), chunks=(chunks,), dtype="uint16",
            compressors=(_HEADER_CODEC,), fill_value=0, overwrite=True, dimension_names=["trace"],
        )
        headers = group.require_group("headers")
        for field, dtype in header_dtypes.items():
            headers.create_array(
                field, shape=(n_traces,), chunks=(writer_chunk(chunks, n_traces),), dtype=dtype,
                compressors=(_HEADER_CODEC,), fill_value=0, overwrite=True,
                dimension_names=["trace"],
            )

    def array(self, swath: str, key: str) -> zarr.Array:
        """Open one array of a swath read-only (``traces``, ``headers/offset``...)."""
        try:
            return zarr.open_array(str(self.path), path=f"{self._swath_path(swath)}/{key}", mode="r")
        except FileNotFoundError as exc:
            raise InputNotFoundError(f"{self.path}: swath {swath!r} has no array {key!r}") from exc

    def header_fields(self, swath: str) -> list[str]:
        root = self.path / SWATHS / swath / "headers"
        return sorted(p.name for p in root.iterdir() if (p / "zarr.json").is_file())

    def headers(self, swath: str, fields: list[str] | None = None) -> dict[str, np.ndarray]:
        """Decoded trace-header fields of a swath, whole, as numpy arrays."""
        names = fields if fields is not None else self.header_fields(swath)
        return {f: self.array(swath, f"headers/{f}")[:] for f in names}

    def iter_blocks(self, swath: str, key: str = "traces") -> Iterator[tuple[int, int, np.ndarray]]:
        """Yield ``(start, stop, block)`` chunk by chunk for one swath's array."""
        arr = self.array(swath, key)
        rec = self.swath(swath)
        for start, stop in rec.chunk_bounds():
            yield start, stop, arr[start:stop]

    def survey_array(self, key: str = "traces"):
        """The whole survey's ``key`` array as one lazy dask array, swaths
        concatenated in manifest order (chunks follow the stored chunks)."""
        import dask.array as da

        parts = [da.from_zarr(self.array(r.name, key)) for r in self.manifest()]
        if not parts:
            raise SwathConflictError(f"{self.path}: the store has no committed swath yet")
        return da.concatenate(parts, axis=0)


def write_trace_chunk(
    store_path: str | Path,
    swath: str,
    start: int,
    samples: np.ndarray,
    raw_headers: np.ndarray,
    qc_flags: np.ndarray | None = None,
) -> None:
    """Write one chunk of every per-trace array of a staged swath.

    Called on workers. ``start`` must be a chunk boundary and the block exactly
    one chunk long (or the last, short one), so no two writers share a chunk.
    """
    write_chunk(store_path, swath, "traces", start, samples)
    base = f"{SWATHS}/{swath}"
    stop = start + samples.shape[0]
    zarr.open_array(str(store_path), path=f"{base}/trace_headers", mode="r+")[start:stop] = raw_headers
    if qc_flags is not None:
        zarr.open_array(str(store_path), path=f"{base}/qc_flags", mode="r+")[start:stop] = qc_flags


def write_chunk(store_path: str | Path, swath: str, key: str, start: int, values: np.ndarray) -> None:
    """Write exactly one chunk (rows ``start:start+len``) of a swath's array.

    ``start`` must be a chunk boundary and the block one chunk long (or the
    last, short one), so no two writers ever share a chunk.
    """
    arr = zarr.open_array(str(store_path), path=f"{SWATHS}/{swath}/{key}", mode="r+")
    stop = start + values.shape[0]
    if start % arr.chunks[0] or (stop != arr.shape[0] and stop - start != arr.chunks[0]):
        raise ValueError(
            f"block [{start}, {stop}) of {swath}/{key} is not one chunk of {arr.chunks[0]} traces"
        )
    arr[start:stop] = values


def write_header_fields(store: SurveyStore, swath: str, fields: dict[str, np.ndarray]) -> None:
    """Write a staged swath's decoded header fields, each array whole."""
    if swath in store.swath_names():
        raise SwathConflictError(f"{store.path}: swath {swath!r} is committed; its headers are final")
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}/headers"]
    for field, values in fields.items():
        group[field][:] = values


def create_header_fields(store: SurveyStore, swath: str, fields: dict[str, np.ndarray],
                         dtypes: dict[str, str], *, chunk_traces: int) -> None:
    """Create a staged swath's ``headers/<field>`` arrays from their values,
    each whole, replacing any there: the arrays ``create_swath_arrays``
    makes for ``header_dtypes`` (same chunks, codec and fill), already filled.

    Creating them empty at staging and filling them later paid zarr's
    metadata work twice, on the driver. Touches only the swath's own staging
    group, so a worker may call it.
    """
    if swath in store.swath_names():
        raise SwathConflictError(f"{store.path}: swath {swath!r} is committed; its headers are final")
    group = zarr.open_group(str(store.path), mode="r+")[f"{SWATHS}/{swath}"].require_group("headers")
    n = len(next(iter(fields.values()))) if fields else 0
    write_whole_arrays(group, fields, dtypes=dtypes, chunks=writer_chunk(max(1, min(chunk_traces, n)), n),
                       compressors=(_HEADER_CODEC,))


def write_whole_arrays(group: zarr.Group, values: dict[str, np.ndarray], *, dtypes: dict[str, str],
                       chunks: int, compressors: tuple, dimension: str = "trace") -> None:
    """Create (replacing any there) and fill 1-D arrays in ``group``, one
    per entry of ``values``, chunked by ``chunks``, with fill value 0.

    What ``group.create_array(..., overwrite=True)`` then a whole write
    gives, byte for byte, for less: the first array of each dtype is created
    that way and the others of that dtype and length get its metadata
    through ``zarr.create_hierarchy`` (zarr v3 array metadata holds no name,
    so arrays of one dtype, shape and codec have the same ``zarr.json``),
    which skipped about 3.5 ms of zarr's per-array work each (measured).
    """
    arrays: dict[str, zarr.Array] = {}
    templates: dict[tuple[str, int], Any] = {}
    pending: dict[str, Any] = {}
    for name, data in values.items():
        kind = (dtypes[name], len(data))
        if kind not in templates:
            arr = group.create_array(
                name, shape=(len(data),), chunks=(chunks,), dtype=dtypes[name], compressors=compressors,
                fill_value=0, overwrite=True, dimension_names=[dimension],
            )
            arrays[name] = arr
            templates[kind] = arr.metadata
        else:
            pending[f"{group.path}/{name}" if group.path else name] = templates[kind]
    if pending:
        for path, node in zarr.create_hierarchy(store=group.store, nodes=pending, overwrite=True):
            if path in pending:
                arrays[path.rsplit("/", 1)[-1]] = node
    for name, data in values.items():
        arrays[name][:] = np.asarray(data, dtype=dtypes[name])
