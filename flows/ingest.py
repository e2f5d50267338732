"""Ingest: SEG-Y swaths into the survey store, in parallel on Dask.

Each Dask task reads one block of whole traces and writes exactly the
matching chunk of every per-trace array, then its done-flag; the driver
commits a swath in the manifest once all its chunks are done. Every file is
checked in full (layout, sampling, every trace header's sample count and
interval) before anything is written, so a bad file leaves the store as it
was; a killed ingest leaves a staging group that the next run resumes.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from descatter.storage.atomic import sweep_partials, write_json_atomic, read_json
from descatter.storage.checkpoints import CHECKPOINTS, Checkpoints, clear_swath
from descatter.storage.faults import fault_point
from descatter.storage.lock import StoreLock
from descatter.storage.runlog import RunLog
from descatter.storage.segy import (
    SegyInfo, decode_fields, quick_fingerprint, read_block, scale_coordinates, scan_segy,
)
from descatter.storage.store import SurveyStore, SwathRecord, chunk_bounds, write_header_fields, write_trace_chunk
from descatter.tasks.swath_geometry import swath_geometry
from descatter.storage.sps import read_sps, sps_trace_geometry
from descatter.storage.stations import read_stations, write_qc_flags, write_stations, write_swath_geometry
from descatter.tasks.config import SurveyConfig
from descatter.tasks.trace_qc import sample_flags
from descatter.tasks.errors import DescatterError, InputNotFoundError, SwathConflictError

log = logging.getLogger(__name__)

STAGE = "ingest"
STAGE_VERSION = 1
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
    store_path: str, info: SegyInfo, swath: str, chunk: int, start: int, stop: int,
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
    scanned: list[tuple[str, SegyInfo]] = []
    for path in paths:
        name = path.stem
        if name in seen:
            raise SwathConflictError(
                f"{path} and {seen[name]} would both be swath {name!r} (a swath is named by its file stem)"
            )
        seen[name] = path
        scanned.append((name, scan_segy(path, layout)))
    committed = {r.name: r for r in store.manifest()}
    plans = []
    for name, info in scanned:
        quick = quick_fingerprint(info)
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
    store.create_swath_arrays(
        plan.name, n_traces=plan.info.n_traces, n_samples=plan.info.n_samples,
        chunk_traces=config.ingest.chunk_traces,
        header_dtypes=header_dtypes(config.ingest.headers.layout()),
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
        try:
            futures = {}
            for plan in plans:
                resumed = _prepare_staging(store, plan, config)
                if resumed:
                    log.info("resuming staged swath %s", plan.name)
                for chunk, (a, b) in enumerate(plan.bounds):
                    fut = client.submit(
                        ingest_chunk, str(store_path), plan.info, plan.name, chunk, a, b,
                        plan.fingerprint, config.qc.clip_run, key=f"ingest-{plan.name}-{chunk}-{plan.fingerprint[:8]}",
                        pure=False,
                    )
                    futures[fut] = plan
            digests: dict[str, dict[int, str]] = {p.name: {} for p in plans}
            done_traces = {p.name: 0 for p in plans}
            next_commit = 0
            for fut in as_completed(list(futures)):
                plan = futures[fut]
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
                while next_commit < len(plans) and len(digests[plans[next_commit].name]) == len(plans[next_commit].bounds):
                    ready = plans[next_commit]
                    report.warnings += _commit(store, ready, digests[ready.name], config)
                    report.added.append(ready.name)
                    report.traces += ready.info.n_traces
                    next_commit += 1
        except BaseException as exc:
            for fut in futures:
                fut.cancel()
            if isinstance(exc, DescatterError):
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
    """Decode a staged swath's raw trace headers into ``headers/<field>``.

    Done once per swath by the writer, whole-array: the 240 header bytes are
    small beside the samples, and one write per field costs far less than
    one per field and chunk (zarr's per-write overhead dominated the ingest
    chunks when they wrote 16 header arrays each).
    """
    raw = store.array(name, "trace_headers")[:]
    ints = decode_fields(raw, layout, info.byte_order)
    scaled = scale_coordinates(ints, info.measurement_system)
    fields = {f: (scaled[f] if f in SCALED_FIELDS else ints[f]) for f in layout}
    write_header_fields(store, name, fields)
    return fields


def build_geometry(store: SurveyStore, name: str, config: SurveyConfig, sps=None, headers=None):
    """Geometry and QC of a staged or committed swath from its stored headers."""
    headers = headers if headers is not None else store.headers(name)
    trace_sps = sps_trace_geometry(sps, headers["field_record"], headers["channel"]) if sps else None
    flags = store.array(name, "qc_flags")[:]
    known = {kind: read_stations(store, kind)["key"] for kind in ("sources", "receivers")}
    return swath_geometry(name, headers, flags, config, known_sources=known["sources"],
                          known_receivers=known["receivers"], sps=trace_sps)


def _commit(store: SurveyStore, plan: _Plan, digests: dict[int, str], config: SurveyConfig) -> list[str]:
    """Geometry, station rows and QC of a fully written swath, then the
    manifest entry that publishes it. Returns warnings."""
    headers = decode_headers(store, plan.name, plan.info, config.ingest.headers.layout())
    geom = build_geometry(store, plan.name, config, load_sps_geometry(store, config), headers=headers)
    counts = store.station_counts()
    stations = {
        "sources": write_stations(store, "sources", geom.new_sources, start=counts["sources"]),
        "receivers": write_stations(store, "receivers", geom.new_receivers, start=counts["receivers"]),
    }
    write_swath_geometry(store, plan.name, geom.arrays, chunk_traces=config.ingest.chunk_traces)
    write_qc_flags(store, plan.name, geom.flags)
    h = hashlib.blake2b(digest_size=16)
    h.update(plan.info.textual + plan.info.extended_textual + plan.info.binary)
    for chunk in range(len(plan.bounds)):
        h.update(bytes.fromhex(digests[chunk]))
    info = plan.info
    if not store.swath_names():
        store.set_attrs(n_samples=info.n_samples, sample_interval_s=info.dt_s,
                        ingest_config=config.ingest.model_dump(mode="json"))
    # later stages reuse the config given at ingest unless told otherwise
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
    for w in geom.warnings:
        log.warning(w)
    return geom.warnings
