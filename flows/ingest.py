"""Ingest: SEG-Y swaths into the survey store, in parallel on Dask.

Each chunk task reads one block of whole traces and writes exactly the
matching chunk of every per-trace array, then its done-flag. Beside them a
geometry task (also on a worker) reads the swath's trace headers from the
file, decodes its header fields, builds its geometry and writes them; once
the chunks and the geometry are done, a flags task joins the chunks' sample
flags with the geometry flags into the QC mask. All of it stays inside the
swath's own staging group. The driver then does only the serial
part, in the order the files were given: it appends the swath's new
stations to the shared station tables, re-points the swath's station
indices if an earlier swath of the same ingest added stations, and commits
the swath in the manifest. Every file is checked in full (layout, sampling,
every trace header's sample count and interval) before anything is
written, so a bad file leaves the store as it was; a killed ingest leaves a
staging group that the next run resumes.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from descatter.storage.atomic import sweep_partials, write_json_atomic, read_json
from descatter.storage.checkpoints import CHECKPOINTS, Checkpoints, clear_swath
from descatter.storage.faults import fault_point
from descatter.storage.lock import StoreLock
from descatter.storage.runlog import RunLog
from descatter.storage.segy import (
    SegyInfo, decode_fields, quick_fingerprint, read_block, read_trace_headers, scale_coordinates, scan_segy,
)
from descatter.flows.cluster import map_chunks
from descatter.flows.sps_geometry import stored_sample_flags
from descatter.storage.store import SurveyStore, SwathRecord, chunk_bounds, create_header_fields, write_trace_chunk
from descatter.tasks.geometry import assign_stations
from descatter.tasks.swath_geometry import header_geometry, merge_sample_flags
from descatter.storage.sps import read_sps, sps_trace_geometry
from descatter.storage.stations import (
    KINDS, StationAppender, read_stations, renumber_stations, write_qc_flags, write_swath_geometry,
)
from descatter.tasks.config import SurveyConfig
from descatter.tasks.trace_qc import sample_flags
from descatter.tasks.errors import DescatterError, InputNotFoundError, SwathConflictError

log = logging.getLogger(__name__)

STAGE = "ingest"
STAGE_VERSION = 1
_PLAN_THREADS = 2  # threads that scan and fingerprint the files before the chunks start
# Fields decoded to float64 metres (scalars applied, feet converted).
SCALED_FIELDS = (
    "source_x", "source_y", "receiver_x", "receiver_y",
    "source_elevation", "receiver_elevation", "offset",
)

Progress = Callable[[str, int, int], None]  # (swath, traces done, traces total)


@dataclass
class IngestReport:
    added: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    resumed_chunks: int = 0
    written_chunks: int = 0
    traces: int = 0
    bytes_read: int = 0
    seconds: float = 0.0
    warnings: list[str] = field(default_factory=list)


def header_dtypes(layout: dict[str, tuple[int, int]]) -> dict[str, str]:
    return {name: ("float64" if name in SCALED_FIELDS else "int32") for name in layout}


def ingest_chunk(
    store_path: str, swath: str, chunk: int, start: int, stop: int, info: SegyInfo,
    fingerprint: str, clip_run: int,
) -> dict:
    """One chunk: read traces [start, stop), write every array's chunk, flag it.

    Idempotent: a chunk already flagged under ``fingerprint`` is not redone.
    Returns a small summary (digest of the raw bytes, counts, seconds).
    """
    ckpt = Checkpoints(store_path, STAGE, swath, fingerprint)
    done = ckpt.summary(chunk)
    if done is not None:
        return {**done, "chunk": chunk, "resumed": True}
    t0 = time.perf_counter()
    samples, raw_headers, digest = read_block(info, start, stop)
    flags = sample_flags(samples, clip_run=clip_run)
    write_trace_chunk(store_path, swath, start, samples, raw_headers, qc_flags=flags)
    summary = {
        "digest": digest.hex(),
        "traces": stop - start,
        "bytes": (stop - start) * info.trace_bytes,
        "seconds": time.perf_counter() - t0,
    }
    ckpt.mark_done(chunk, summary)
    return {**summary, "chunk": chunk, "resumed": False}


def ingest_geometry(
    store_path: str, info: SegyInfo, swath: str, config: SurveyConfig, known: dict[str, int],
    sps_files: list[str] | None,
) -> dict:
    """One swath's geometry, while its chunks are read: decode the header
    fields (read from the SEG-Y file, not from the chunks' copy), build the
    geometry and its flags (:func:`~descatter.tasks.swath_geometry.header_geometry`),
    write the header fields and geometry, all in the swath's staging group.
    The sample flags join them in :func:`ingest_flags`, once the chunks are done.

    Stations are looked up in the first ``known`` rows of each table (its
    committed length when the ingest began); the driver gives stations that
    an earlier swath of the same ingest appended meanwhile their final rows
    (:func:`_commit`). Returns the new station rows found against those
    rows, the geometry flags, the warnings and the seconds taken. Redone
    whole on a resumed ingest: it only rewrites arrays of an uncommitted swath.
    """
    t0 = time.perf_counter()
    store = SurveyStore.open(store_path)
    headers = decode_headers(store, swath, info, config.ingest.headers.layout())
    sps = None
    if sps_files:
        sps = read_sps(*sps_files, revision=config.geometry.sps_revision,
                       columns=config.geometry.sps_columns or None)
    trace_sps = sps_trace_geometry(sps, headers["field_record"], headers["channel"]) if sps else None
    keys = {kind: read_stations(store, kind, n=known.get(kind), fields=("key",))["key"] for kind in KINDS}
    geom = header_geometry(swath, headers, config, known_sources=keys["sources"], known_receivers=keys["receivers"],
                           sps=trace_sps)
    write_swath_geometry(store, swath, geom.arrays, chunk_traces=config.ingest.chunk_traces)
    return {"swath": swath, "new_sources": geom.new_sources, "new_receivers": geom.new_receivers,
            "flags": geom.flags, "warnings": geom.warnings, "seconds": time.perf_counter() - t0}


def ingest_flags(store_path: str, swath: str, config: SurveyConfig, built: dict, chunks: list[dict]) -> dict:
    """Once every chunk is written (``chunks``: their summaries, passed only to
    order this task after them): join the chunks' sample flags with the
    geometry task's flags (``built``) and write the swath's QC mask. Raises
    :class:`TraceQcError` for a flag whose policy is ``error``. Returns
    ``built`` without its flags, with the flagged-traces warning first and
    the seconds of both tasks."""
    t0 = time.perf_counter()
    store = SurveyStore.open(store_path)
    # sample bits only: a resumed ingest finds the joined mask an earlier attempt wrote
    sample = stored_sample_flags(store, swath)
    flags, warnings = merge_sample_flags(swath, built["flags"], sample, config)
    write_qc_flags(store, swath, flags)
    out = {k: v for k, v in built.items() if k != "flags"}
    return {**out, "warnings": warnings + built["warnings"], "seconds": built["seconds"] + time.perf_counter() - t0}


# worker task states of a task still running (cancelled ones run to their end)
_RUNNING_STATES = ("executing", "long-running", "cancelled", "resumed")


def _running_keys(keys: set, dask_worker=None) -> list:
    return [k for k, ts in dask_worker.state.tasks.items() if k in keys and ts.state in _RUNNING_STATES]


def wait_for_running(client, keys: set, *, timeout_s: float = 120.0, poll_s: float = 0.05) -> bool:
    """Block until no worker runs any of ``keys`` any more (at most ``timeout_s``).

    Cancelling a future does not stop a task a worker is executing; it runs
    to its end and its result is dropped. Returns False on a timeout (logged)."""
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            running = [k for ks in client.run(_running_keys, keys).values() for k in ks]
        except Exception as exc:  # a worker lost meanwhile runs nothing of ours any more
            log.warning("could not ask the workers which tasks still run: %s", exc)
            return False
        if not running:
            return True
        if time.monotonic() > deadline:
            log.warning("%d cancelled ingest task(s) still running after %g s", len(running), timeout_s)
            return False
        time.sleep(poll_s)


@dataclass
class _Plan:
    name: str
    info: SegyInfo
    quick: str
    fingerprint: str
    bounds: list[tuple[int, int]]


def _stage_fingerprint(quick: str, config: SurveyConfig) -> str:
    doc = {"stage": STAGE, "version": STAGE_VERSION, "file": quick, "ingest": config.ingest.model_dump(),
           "clip_run": config.qc.clip_run}
    return hashlib.blake2b(json.dumps(doc, sort_keys=True).encode(), digest_size=16).hexdigest()


def _check_sampling(files: list[tuple[str, SegyInfo]], store: SurveyStore) -> None:
    ref_ns, ref_dt = store.n_samples, store.sample_interval_s
    ref_what = f"the store {store.path}"
    if not store.swath_names():
        ref_ns = ref_dt = None
    for name, info in files:
        if ref_ns is None:
            ref_ns, ref_dt, ref_what = info.n_samples, info.dt_s, info.path
            continue
        if info.n_samples != ref_ns:
            raise SwathConflictError(
                f"{info.path}: {info.n_samples} samples per trace, but {ref_what} has {ref_ns}; "
                "a survey store holds one sampling (resample the swath first)"
            )
        if abs(info.dt_s - ref_dt) > 1e-9:
            raise SwathConflictError(
                f"{info.path}: sample interval {info.dt_s * 1e3:g} ms, but {ref_what} has "
                f"{ref_dt * 1e3:g} ms; a survey store holds one sampling"
            )


def _plan(store: SurveyStore, paths: list[Path], config: SurveyConfig, report: IngestReport,
          runlog: RunLog) -> list[_Plan]:
    layout = config.ingest.headers.layout()
    seen: dict[str, Path] = {}
    for path in paths:
        name = path.stem
        if name in seen:
            raise SwathConflictError(
                f"{path} and {seen[name]} would both be swath {name!r} (a swath is named by its file stem)"
            )
        seen[name] = path

    def scan(path: Path) -> tuple[str, SegyInfo, str]:
        info = scan_segy(path, layout)
        return path.stem, info, quick_fingerprint(info)

    # On two threads (hashing and numpy's copies release the GIL): the ten files of the
    # 1.1 GB survey scanned and fingerprinted in 0.11 s instead of 0.20 s, while the workers
    # wait for their first chunk. map raises the error of the first bad file in the given order.
    with ThreadPoolExecutor(max_workers=_PLAN_THREADS) as pool:
        scanned = list(pool.map(scan, paths))
    committed = {r.name: r for r in store.manifest()}
    plans = []
    for name, info, quick in scanned:
        if name in committed:
            if committed[name].quick_fingerprint == quick:
                msg = f"{info.path}: swath {name!r} is already in the store (same file); skipped"
                log.info(msg)
                runlog.write(STAGE, "skip", swath=name, reason="already committed")
                report.skipped.append(name)
                continue
            raise SwathConflictError(
                f"{info.path}: a different file is already committed as swath {name!r} "
                f"(from {committed[name].file}); use 'descatter swath STORE replace {name} FILE' "
                "or rename the file"
            )
        plans.append(_Plan(name, info, quick, _stage_fingerprint(quick, config),
                           chunk_bounds(info.n_traces, config.ingest.chunk_traces)))
    _check_sampling([(p.name, p.info) for p in plans], store)
    return plans


def _stage_marker(store: SurveyStore, name: str) -> Path:
    return store.path / CHECKPOINTS / STAGE / name / "stage.json"


def _prepare_staging(store: SurveyStore, plan: _Plan, config: SurveyConfig) -> bool:
    """Create the swath's staging arrays unless a resumable staging exists.
    Returns True when resuming."""
    marker = _stage_marker(store, plan.name)
    if store.has_swath_group(plan.name) and marker.is_file():
        if read_json(marker).get("fingerprint") == plan.fingerprint:
            return True
    store.drop_swath_group(plan.name)
    clear_swath(store.path, plan.name)
    # Only the arrays the chunk tasks write; the geometry task creates the
    # header fields with their values (create_header_fields).
    store.create_swath_arrays(
        plan.name, n_traces=plan.info.n_traces, n_samples=plan.info.n_samples,
        chunk_traces=config.ingest.chunk_traces, header_dtypes={},
        compression_level=config.ingest.compression_level,
    )
    write_json_atomic(marker, {"fingerprint": plan.fingerprint, "file": plan.info.path})
    return False


def _discard_staging(store: SurveyStore, plans: list[_Plan]) -> None:
    for plan in plans:
        if plan.name not in store.swath_names():
            store.drop_swath_group(plan.name)
            clear_swath(store.path, plan.name)


def ingest_swaths(
    store_path: str | Path,
    files: list[str | Path],
    config: SurveyConfig,
    *,
    client,
    progress: Progress | None = None,
    runlog: RunLog | None = None,
) -> IngestReport:
    """Add SEG-Y files to the store, one swath each, resuming a killed ingest.

    Holds the store's writer lock throughout. A file already committed with
    the same content is skipped; a different file under a committed name is
    refused. On a bad input the swaths staged by this call are discarded and
    the store is as before.
    """
    from distributed import as_completed

    paths = [Path(f) for f in files]
    for p in paths:
        if not p.is_file():
            raise InputNotFoundError(f"{p}: no such SEG-Y file")
    report = IngestReport()
    t_start = time.perf_counter()
    store_path = Path(store_path)
    with StoreLock(store_path, command="ingest"):
        store = SurveyStore.open_or_create(store_path)
        runlog = runlog or RunLog(store_path)
        sweep_partials(store_path)
        plans = _plan(store, paths, config, report, runlog)
        if not plans:
            return report
        runlog.write(STAGE, "start", swaths=[p.name for p in plans],
                     traces=sum(p.info.n_traces for p in plans))
        futures: dict = {}
        background: list = []  # awaited through the flags tasks; cancelled with the rest
        try:
            geometry_futures = set()
            # Geometry tasks look stations up in the tables as committed now;
            # _commit re-points what earlier swaths of this ingest add.
            counts = store.station_counts()
            writer = StationAppender(store)
            tables = {kind: _Appended(counts[kind], writer) for kind in KINDS}
            sps_files = store.attrs.get("sps_files") or None  # recorded by 'descatter geometry --sps'
            # Keys unique to this call: the scheduler hands back a task it still
            # holds under a submitted key instead of running it again (a chunk
            # of an earlier call on another store, or a geometry built with
            # other QC settings, which the fingerprint does not cover).
            token = uuid.uuid4().hex[:8]
            for plan in plans:
                resumed = _prepare_staging(store, plan, config)
                if resumed:
                    log.info("resuming staged swath %s", plan.name)
                chunk_futures = map_chunks(client, ingest_chunk, str(store_path), plan.name, plan.bounds,
                                           key=f"ingest-{plan.name}-{token}", info=plan.info,
                                           fingerprint=plan.fingerprint, clip_run=config.qc.clip_run)
                futures.update(dict.fromkeys(chunk_futures, plan))
                # the geometry is built beside the chunks; the flags task joins both
                geometry = client.submit(
                    ingest_geometry, str(store_path), plan.info, plan.name, config, counts, sps_files,
                    key=f"ingest-geometry-{plan.name}-{token}", pure=False,
                )
                background.append(geometry)
                fut = client.submit(ingest_flags, str(store_path), plan.name, config, geometry, chunk_futures,
                                    key=f"ingest-flags-{plan.name}-{token}", pure=False)
                futures[fut] = plan
                geometry_futures.add(fut)
            digests: dict[str, dict[int, str]] = {p.name: {} for p in plans}
            built: dict[str, dict] = {}
            failed: dict[str, object] = {}
            done_traces = {p.name: 0 for p in plans}
            next_commit = 0
            for fut in as_completed(list(futures)):
                plan = futures[fut]
                if fut in geometry_futures:
                    if fut.status == "error":
                        # raised in its turn to commit, so the swaths before it
                        # still commit whatever the workers' timing
                        failed[plan.name] = fut
                    else:
                        built[plan.name] = fut.result()
                        # a task record, not a batch: it is no chunk and has no done-flag
                        runlog.write(STAGE, "task", swath=plan.name, task="geometry",
                                     seconds=round(built[plan.name]["seconds"], 4))
                else:
                    summary = fut.result()
                    digests[plan.name][summary["chunk"]] = summary["digest"]
                    done_traces[plan.name] += summary["traces"]
                    if summary["resumed"]:
                        report.resumed_chunks += 1
                    else:
                        report.written_chunks += 1
                        report.bytes_read += summary["bytes"]
                    runlog.write(STAGE, "batch", swath=plan.name, chunk=summary["chunk"],
                                 traces=summary["traces"], seconds=round(summary["seconds"], 4),
                                 resumed=summary["resumed"])
                    if progress:
                        progress(plan.name, done_traces[plan.name], plan.info.n_traces)
                    if not summary["resumed"]:
                        fault_point(STAGE)
                # Commit finished swaths in the order the files were given,
                # so the manifest order does not depend on worker timing.
                while next_commit < len(plans):
                    ready = plans[next_commit]
                    if ready.name in failed:
                        failed[ready.name].result()  # raises the task's error
                    if ready.name not in built or len(digests[ready.name]) < len(ready.bounds):
                        break
                    report.warnings += _commit(store, ready, digests[ready.name], built.pop(ready.name),
                                               tables, config, first=next_commit == 0)
                    report.added.append(ready.name)
                    report.traces += ready.info.n_traces
                    next_commit += 1
        except BaseException as exc:
            for fut in [*futures, *background]:
                fut.cancel()
            if isinstance(exc, DescatterError):
                # a cancelled task already running goes on to its end: let it finish writing
                # before its staging group is deleted, or it would leave part of one behind.
                # If it is still running after the wait, the staging stays; it is never
                # committed, and the next ingest of the file drops or resumes it.
                if wait_for_running(client, {f.key for f in [*futures, *background]}):
                    _discard_staging(store, plans)
                runlog.write(STAGE, "error", error=str(exc))
            raise
        report.seconds = time.perf_counter() - t_start
        runlog.write(STAGE, "end", added=report.added, traces=report.traces,
                     seconds=round(report.seconds, 3), resumed_chunks=report.resumed_chunks)
        return report


def load_sps_geometry(store: SurveyStore, config: SurveyConfig):
    """The SEG SPS set recorded in the store by 'descatter geometry --sps', or None."""
    files = store.attrs.get("sps_files")
    if not files:
        return None
    return read_sps(*files, revision=config.geometry.sps_revision, columns=config.geometry.sps_columns or None)


def decode_headers(store: SurveyStore, name: str, info: SegyInfo, layout: dict[str, tuple[int, int]]) -> dict:
    """Decode a staged swath's trace headers, read from its SEG-Y file, into ``headers/<field>``.

    Done once per swath, whole-array, by its geometry task: the 240 header
    bytes are small beside the samples, and one write per field costs far
    less than one per field and chunk (zarr's per-write overhead dominated
    the ingest chunks when they wrote 16 header arrays each). Read from the
    file, not from the chunks' ``trace_headers``, so the geometry is built
    while the chunks are read.
    """
    raw = read_trace_headers(info)
    ints = decode_fields(raw, layout, info.byte_order)
    scaled = scale_coordinates(ints, info.measurement_system)
    fields = {f: (scaled[f] if f in SCALED_FIELDS else ints[f]) for f in layout}
    chunk_traces = store.array(name, "trace_headers").chunks[0]  # the swath's chunks, as staged
    create_header_fields(store, name, fields, header_dtypes(layout), chunk_traces=chunk_traces)
    return fields


class _Appended:
    """One station table as this ingest grows it: its committed length when
    the ingest began (what the geometry tasks looked stations up in) and the
    keys appended since, in row order."""

    def __init__(self, start: int, writer: StationAppender):
        self.start = start
        self.keys = np.zeros(0, np.int64)
        self.writer = writer

    @property
    def count(self) -> int:
        return self.start + len(self.keys)


_INDEX_FIELDS = {"sources": "source_index", "receivers": "receiver_index"}


def _commit(store: SurveyStore, plan: _Plan, digests: dict[int, str], built: dict,
            tables: dict[str, _Appended], config: SurveyConfig, *, first: bool) -> list[str]:
    """Publish a swath whose chunks and geometry task are done: append its
    new stations, then the manifest entry (the commit point). Returns warnings.

    ``built`` is the geometry task's result. It numbered the stations it did
    not find in the first ``tables[kind].start`` rows from there on, in order
    of first appearance; :func:`descatter.tasks.geometry.assign_stations`
    against the keys appended since maps them to the rows they get now, the
    same rows (and new-station order) as a lookup in the whole table: a
    station an earlier swath of this ingest appended keeps that row, the
    others follow the table's end in the same order. Their rows' means come
    from this swath's traces alone, so dropping the ones already appended
    leaves the rest bit for bit.
    """
    stations, appended = {}, {}
    for kind, table in tables.items():
        rows = built[f"new_{kind}"]
        found, _ = assign_stations(rows["key"], table.keys)
        index = table.start + found
        if not np.array_equal(index, np.arange(table.start, table.start + len(index))):
            renumber_stations(store, plan.name, _INDEX_FIELDS[kind], first=table.start, index=index)
        new = index >= table.count
        appended[kind] = rows["key"][new]
        stations[kind] = table.writer.append(kind, {f: v[new] for f, v in rows.items()}, start=table.count)
    h = hashlib.blake2b(digest_size=16)
    h.update(plan.info.textual + plan.info.extended_textual + plan.info.binary)
    for chunk in range(len(plan.bounds)):
        h.update(bytes.fromhex(digests[chunk]))
    info = plan.info
    if first:
        if not store.swath_names():
            store.set_attrs(n_samples=info.n_samples, sample_interval_s=info.dt_s,
                            ingest_config=config.ingest.model_dump(mode="json"))
        # later stages reuse the config given at ingest unless told otherwise
        # (one config per ingest: set with its first commit)
        store.set_attrs(config=config.model_dump(mode="json"))
    store.commit_swath(SwathRecord(
        name=plan.name, file=str(Path(info.path).resolve()), size=info.size,
        fingerprint=h.hexdigest(), quick_fingerprint=plan.quick, n_traces=info.n_traces,
        chunk_traces=config.ingest.chunk_traces, byte_order=info.byte_order,
        format_code=info.format_code, textual_encoding=info.textual_encoding,
        measurement_system=info.measurement_system, textual=info.textual,
        extended_textual=info.extended_textual, binary=info.binary,
        committed_at=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    ), stations=stations)
    for kind, table in tables.items():
        table.keys = np.concatenate([table.keys, appended[kind]])
    for w in built["warnings"]:
        log.warning(w)
    return built["warnings"]
