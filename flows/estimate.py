"""Estimation, part 1: windowed spectra and per-swath statistics on Dask.

Spectra are chunk tasks (one chunk of traces in, one chunk of spectra out,
then a done-flag). Statistics are computed per swath from groups of whole
shots (receiver pairs), whole receivers (source pairs, also between two
swaths) and chunks (log power), summed in a fixed tree order so reruns are
bit-identical, and written whole under ``stats/<swath>`` or
``stats/<a>+<b>``. Each stage is keyed by a fingerprint of its inputs and
parameters; a rerun skips what is done and redoes what a change affects.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from descatter.flows.cluster import map_chunks
from descatter.storage.atomic import read_json, write_json_atomic
from descatter.storage.checkpoints import CHECKPOINTS, Checkpoints
from descatter.storage.estimation import (
    create_spectra, read_spectra, spectra_shape, write_spectra_chunk, write_stats,
)
from descatter.storage.faults import fault_point
from descatter.storage.runlog import RunLog
from descatter.storage.stations import read_qc_flags, read_stations, read_swath_geometry
from descatter.storage.store import SurveyStore, SwathRecord
from descatter.tasks.config import SurveyConfig
from descatter.tasks.log_power import log_power, log_power_sums, offset_bins
from descatter.tasks.pairs import (
    bridge_components, graph_components, neighbour_pairs, receiver_pair_sums, source_pair_sums,
    source_pair_sums_between,
)
from descatter.tasks.spectra import band_frequencies, windowed_spectra
from descatter.tasks.statistics import LogPowerSums, PairSums
from descatter.tasks.trace_qc import usable_traces

log = logging.getLogger(__name__)

STAGE_VERSION = 1
Progress = Callable[[str, int, int], None]  # (stage, done, total)


def _fingerprint(doc: dict) -> str:
    return hashlib.blake2b(json.dumps(doc, sort_keys=True, default=str).encode(), digest_size=16).hexdigest()


def spectra_params(config: SurveyConfig, *, dt_s: float) -> dict:
    """Plain numbers for the spectra kernel, from the config."""
    a = config.analysis
    n_win = int(round((a.window_end_s - a.window_start_s) / dt_s)) + 1
    n_fft = a.n_fft or int(2 ** np.ceil(np.log2(max(n_win, 8))))
    v = np.asarray(a.velocity, float)
    return {
        "dt_s": dt_s, "window_s": (a.window_start_s, a.window_end_s), "taper_s": a.taper_s,
        "stretch_mute": a.stretch_mute, "n_fft": n_fft, "band_hz": tuple(a.band_hz),
        "moveout": a.moveout, "lmo_velocity_mps": a.lmo_velocity_mps,
        "velocity_t0_s": v[:, 0].tolist(), "velocity_vrms_mps": v[:, 1].tolist(),
    }


# -- spectra -------------------------------------------------------------

def spectra_chunk(store_path: str, swath: str, chunk: int, start: int, stop: int, params: dict,
                  fingerprint: str) -> dict:
    """One chunk of traces -> one chunk of windowed spectra, then its flag."""
    ckpt = Checkpoints(store_path, "spectra", swath, fingerprint)
    if ckpt.is_done(chunk):
        return {"swath": swath, "chunk": chunk, "resumed": True, "traces": stop - start, "seconds": 0.0}
    t0 = time.perf_counter()
    store = SurveyStore.open(store_path)
    traces = store.array(swath, "traces")[start:stop]
    offset = store.array(swath, "geometry/offset")[start:stop]
    delay_s = store.array(swath, "headers/delay_ms")[start:stop] * 1e-3
    p = dict(params)
    spectra = windowed_spectra(
        traces, offset_m=offset, delay_s=delay_s, dt_s=p["dt_s"],
        velocity_t0_s=np.asarray(p["velocity_t0_s"]), velocity_vrms_mps=np.asarray(p["velocity_vrms_mps"]),
        window_s=p["window_s"], taper_s=p["taper_s"], stretch_mute=p["stretch_mute"], n_fft=p["n_fft"],
        band_hz=p["band_hz"], moveout=p["moveout"], lmo_velocity_mps=p["lmo_velocity_mps"],
    )
    write_spectra_chunk(store_path, swath, start, spectra)
    ckpt.mark_done(chunk, {"seconds": time.perf_counter() - t0})
    return {"swath": swath, "chunk": chunk, "resumed": False, "traces": stop - start,
            "seconds": time.perf_counter() - t0}


# -- statistics tasks (run on workers) ------------------------------------

def receiver_pairs_task(store_path: str, swath: str, rows: np.ndarray, shot: np.ndarray, receiver: np.ndarray,
                        pairs: np.ndarray) -> PairSums:
    """Receiver-pair sums of one group of whole shots: ``rows`` (live traces of
    the group, sorted) and their shot and receiver come from the driver, so a
    task reads only its own spectra."""
    spectra = read_spectra(store_path, swath, rows)
    return receiver_pair_sums(spectra, shot=shot, receiver=receiver, pairs=pairs)


def source_pairs_task(store_path: str, swath: str, rows: np.ndarray, source: np.ndarray, receiver: np.ndarray,
                      pairs: np.ndarray) -> PairSums:
    spectra = read_spectra(store_path, swath, rows)
    return source_pair_sums(spectra, shot_source=source, receiver=receiver, pairs=pairs)


def source_pairs_between_task(store_path: str, swath_a: str, swath_b: str, side_a: tuple, side_b: tuple,
                              pairs: np.ndarray) -> PairSums:
    """Source pairs across two swaths at common receivers; each side is
    (rows, source, receiver) of that swath's live traces at the receivers."""
    (ra, ia, qa), (rb, ib, qb) = side_a, side_b
    return source_pair_sums_between(read_spectra(store_path, swath_a, ra), read_spectra(store_path, swath_b, rb),
                                    shot_source_a=ia, receiver_a=qa, shot_source_b=ib, receiver_b=qb, pairs=pairs)


def log_power_task(store_path: str, swath: str, start: int, stop: int, source: np.ndarray, receiver: np.ndarray,
                   offset_bin: np.ndarray, live: np.ndarray, sizes: dict) -> LogPowerSums:
    spectra = read_spectra(store_path, swath, slice(start, stop))
    return log_power_sums(
        log_power(spectra), source=np.maximum(source, 0), receiver=np.maximum(receiver, 0), offset_bin=offset_bin,
        n_sources=sizes["sources"], n_receivers=sizes["receivers"], n_offset_bins=sizes["offset_bins"], live=live,
    )


def _traces_at(receivers: np.ndarray, *swaths: dict) -> np.ndarray:
    """Receiver index of every live trace of the swaths at ``receivers``: the
    labels that split cross-swath work into groups of about a target number
    of traces (not of receivers, whose traces span both swaths)."""
    return np.concatenate([g["receiver_index"][np.isin(g["receiver_index"], receivers) & g["live"]]
                           for g in swaths])


def _side(g: dict, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows (live, in ``mask``), sources and receivers of one swath's traces."""
    rows = np.flatnonzero(mask & g["live"])
    return rows, g["source_index"][rows], g["receiver_index"][rows]


@dataclass
class Timed:
    """A partial statistic with the seconds its tasks took (summed up the
    tree), so the run log can account for the statistics stage."""

    value: object
    seconds: float


def _timed(fn, *args) -> Timed:
    t0 = time.perf_counter()
    value = fn(*args)
    return Timed(value, time.perf_counter() - t0)


def add_parts(a, b):
    """One step of the tree sum: sums (or :class:`Timed` sums, seconds added)."""
    if not isinstance(a, Timed) and not isinstance(b, Timed):
        return a + b
    t0 = time.perf_counter()
    value = getattr(a, "value", a) + getattr(b, "value", b)
    return Timed(value, getattr(a, "seconds", 0.0) + getattr(b, "seconds", 0.0) + time.perf_counter() - t0)


def write_stats_task(store_path: str, key: str, group: str, total, fingerprint: str) -> dict:
    """Write a reduced statistic and its done-flag; return a small summary
    (with the seconds of every task that made it, when they were timed)."""
    t0 = time.perf_counter()
    seconds = total.seconds if isinstance(total, Timed) else None
    total = total.value if isinstance(total, Timed) else total
    if isinstance(total, PairSums):
        arrays = total.to_arrays()
        summary = {"pairs": int(len(total.pairs)), "products": int(total.count.sum())}
    else:
        arrays = lps_to_arrays(total)
        summary = {"traces": int(total.n_traces)}
    write_stats(store_path, key, group, arrays)
    Checkpoints(store_path, "stats", key, fingerprint).mark_done(_GROUP_CHUNK[group], summary)
    if seconds is not None:
        summary["seconds"] = round(seconds + time.perf_counter() - t0, 4)
    return summary


_GROUP_CHUNK = {"receiver_pairs": 0, "source_pairs": 1, "log_power": 2}


def lps_to_arrays(s: LogPowerSums) -> dict[str, np.ndarray]:
    out = {"sum_sq": s.sum_sq, "n_traces": np.array(s.n_traces, np.int64)}
    for kind, v in s.sums.items():
        out[f"sums.{kind}"] = v
        out[f"counts.{kind}"] = s.counts[kind]
    for key, v in s.cross.items():
        out["cross." + key.replace("|", "-")] = v
    return out


def lps_from_arrays(a: dict[str, np.ndarray]) -> LogPowerSums:
    sums = {k.split(".", 1)[1]: v for k, v in a.items() if k.startswith("sums.")}
    counts = {k.split(".", 1)[1]: v for k, v in a.items() if k.startswith("counts.")}
    cross = {k.split(".", 1)[1].replace("-", "|"): v for k, v in a.items() if k.startswith("cross.")}
    return LogPowerSums(sums, counts, cross, a["sum_sq"], int(np.asarray(a["n_traces"]).reshape(-1)[0]))


def _map_timed(client, fn, store_path: str, swath: str, calls: list[tuple]) -> list:
    """``_timed(fn, store_path, swath, *args)`` for each ``args`` in ``calls``, as
    one graph update (a submit per task cost the flow process 1-8 ms each)."""
    if not calls:
        return []
    columns = [list(c) for c in zip(*calls)]
    n = len(calls)
    return client.map(_timed, [fn] * n, [store_path] * n, [swath] * n, *columns, pure=False)


def tree_sum(client, parts: list):
    """Sum futures pairwise in a fixed order: ((p0+p1)+(p2+p3))+..., the
    same tree whatever finishes first, so results are bit-identical. One
    graph update per level of the tree."""
    while len(parts) > 1:
        nxt = client.map(add_parts, parts[0:len(parts) - 1:2], parts[1::2], pure=False)
        if len(parts) % 2:
            nxt.append(parts[-1])
        parts = nxt
    return parts[0]


def _groups(labels: np.ndarray, target: int) -> list[np.ndarray]:
    """Split the distinct labels (shots or receivers) into consecutive groups
    of about ``target`` traces each."""
    ids, counts = np.unique(labels, return_counts=True)
    edges = np.searchsorted(np.cumsum(counts), np.arange(target, counts.sum(), target))
    return [g for g in np.split(ids, np.unique(edges + 1)) if g.size]


@dataclass
class StatsReport:
    spectra_chunks: int = 0
    spectra_resumed: int = 0
    stats_computed: list[str] = field(default_factory=list)
    stats_skipped: list[str] = field(default_factory=list)
    bridges: list[dict] = field(default_factory=list)
    components: dict = field(default_factory=dict)
    freqs_hz: np.ndarray | None = None
    seconds: float = 0.0
    fingerprints: dict = field(default_factory=dict)  # statistics key -> stage fingerprint


def _stage_marker(store: SurveyStore, stage: str, swath: str) -> Path:
    return store.path / CHECKPOINTS / stage / swath / "stage.json"


def _marker_matches(store: SurveyStore, stage: str, swath: str, fingerprint: str) -> bool:
    marker = _stage_marker(store, stage, swath)
    return marker.is_file() and read_json(marker).get("fingerprint") == fingerprint


def submit_spectra(store: SurveyStore, records: list[SwathRecord], params: dict, n_freq: int, *, client,
                   runlog: RunLog) -> tuple[dict[str, str], list]:
    """Send every swath's spectra chunks to the workers; returns each swath's
    spectra fingerprint and the futures (:func:`collect_spectra` waits on them)."""
    fps, futures = {}, []
    token = uuid.uuid4().hex[:8]
    for rec in records:
        fp = _fingerprint({"v": STAGE_VERSION, "swath": rec.fingerprint, "params": params})
        fps[rec.name] = fp
        if not (_marker_matches(store, "spectra", rec.name, fp)
                and spectra_shape(store, rec.name) == (rec.n_traces, n_freq)):
            create_spectra(store, rec.name, n_traces=rec.n_traces, n_freq=n_freq, chunk_traces=rec.chunk_traces)
            Checkpoints(store.path, "spectra", rec.name, fp).clear()
            write_json_atomic(_stage_marker(store, "spectra", rec.name), {"fingerprint": fp})
        # keys of this call's own: one equal to an earlier call's still-held future would be
        # answered with that result, not run (another store with the same swath, a retry)
        futures += map_chunks(client, spectra_chunk, str(store.path), rec.name, rec.chunk_bounds(),
                              key=f"spectra-{rec.name}-{token}", params=params, fingerprint=fp)
    runlog.write("spectra", "start", swaths=[r.name for r in records], chunks=len(futures))
    return fps, futures


def collect_spectra(futures: list, total: int, *, runlog: RunLog, report: StatsReport,
                    progress: Progress | None) -> None:
    """Wait for the spectra chunks, logging each and the stage's end."""
    from distributed import as_completed

    done = 0
    for fut in as_completed(futures):
        s = fut.result()
        done += s["traces"]
        report.spectra_chunks += 1
        report.spectra_resumed += s["resumed"]
        runlog.write("spectra", "batch", swath=s["swath"], chunk=s["chunk"], traces=s["traces"], seconds=round(s["seconds"], 4),
                     resumed=s["resumed"])
        if progress:
            progress("spectra", done, total)
        if not s["resumed"]:
            fault_point("spectra")
    runlog.write("spectra", "end", chunks=report.spectra_chunks, resumed=report.spectra_resumed)


def _present(geoms: dict, field: str, n: int) -> np.ndarray:
    """bool [n]: stations that some committed swath's traces use."""
    mask = np.zeros(n, bool)
    for g in geoms.values():
        idx = g[field]
        mask[idx[(idx >= 0) & (idx < n)]] = True
    return mask


def allowed_pairs(x: np.ndarray, y: np.ndarray, *, radius_m: float, bridge: bool, kind: str,
                  report: StatsReport, present: np.ndarray | None = None) -> np.ndarray:
    """Neighbour pairs within the radius, plus bridges between components,
    among the ``present`` stations (default: all); indices into ``x``."""
    rows = np.arange(len(x)) if present is None else np.flatnonzero(present)
    x, y = x[rows], y[rows]
    pairs = neighbour_pairs(x, y, radius_m=radius_m)
    n_comp, _ = graph_components(len(x), pairs)
    entry = {"stations": len(x), "pairs": len(pairs), "components_before": n_comp, "bridged": 0}
    if n_comp > 1 and bridge:
        extra, bridges = bridge_components(x, y, pairs)
        pairs = np.unique(np.concatenate([pairs, extra]), axis=0)
        for b in bridges:
            report.bridges.append({"kind": kind, **b})
        entry["bridged"] = int(sum(b.get("bridged", True) for b in bridges))
        entry["components_after"] = graph_components(len(x), pairs)[0]
    else:
        entry["components_after"] = n_comp
    report.components[kind] = entry
    return rows[pairs].reshape(-1, 2) if len(pairs) else pairs.reshape(0, 2)


def _subset(pairs: np.ndarray, members: np.ndarray) -> np.ndarray:
    return pairs[np.isin(pairs, members).all(axis=1)]


def _between(pairs: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    in_a, in_b = np.isin(pairs, a), np.isin(pairs, b)
    return pairs[(in_a[:, 0] & in_b[:, 1]) | (in_b[:, 0] & in_a[:, 1])]


def run_statistics(store: SurveyStore, config: SurveyConfig, *, client, runlog: RunLog,
                   progress: Progress | None = None) -> StatsReport:
    """Spectra and every swath's (and swath pair's) statistics, resumable."""
    t0 = time.perf_counter()
    report = StatsReport()
    records = store.manifest()
    params = spectra_params(config, dt_s=store.sample_interval_s)
    freqs, _ = band_frequencies(n_fft=params["n_fft"], dt_s=params["dt_s"], band_hz=params["band_hz"])
    report.freqs_hz = freqs
    spectra_fps, spectra = submit_spectra(store, records, params, len(freqs), client=client, runlog=runlog)
    # While the workers take the spectra: the geometry and QC flags of every swath (ingest's,
    # which the spectra do not change), read once here; the tasks get their rows, not the whole
    # swath. Read after the wait, they had kept both workers idle for about 0.15 s (502,400 traces).
    est = config.estimate
    src, rcv = read_stations(store, "sources"), read_stations(store, "receivers")
    exclude_bits = config.qc.exclude_bits()
    geoms = {r.name: read_swath_geometry(store, r.name, ["shot", "source_index", "receiver_index", "offset"])
             for r in records}
    for name, g in geoms.items():
        g["live"] = usable_traces(read_qc_flags(store, name), g["source_index"], g["receiver_index"],
                                  exclude_bits=exclude_bits)
    # pairs among the stations of committed swaths only: a removed swath's stations stay in the
    # append-only tables, and must not connect (or keep from bridging) what its traces no longer do
    present = {kind: _present(geoms, f"{kind}_index", len(table["x"]))
               for kind, table in (("source", src), ("receiver", rcv))}
    rpairs = allowed_pairs(rcv["x"], rcv["y"], radius_m=est.receiver_radius_m,
                           bridge=est.bridge_components, kind="receivers", report=report, present=present["receiver"])
    spairs = allowed_pairs(src["x"], src["y"], radius_m=est.source_radius_m,
                           bridge=est.bridge_components, kind="sources", report=report, present=present["source"])
    collect_spectra(spectra, sum(r.n_traces for r in records), runlog=runlog, report=report, progress=progress)
    jobs = []  # (key, group, fingerprint, future of the reduced statistic)
    done_before = []  # (key, group) finished by an earlier run: the run log names them
    for i, rec in enumerate(records):
        g = geoms[rec.name]
        srcs = np.unique(g["source_index"][g["source_index"] >= 0])
        rcvs = np.unique(g["receiver_index"][g["receiver_index"] >= 0])
        rp, sp = _subset(rpairs, rcvs), _subset(spairs, srcs)
        sizes = {"sources": int(srcs.max()) + 1, "receivers": int(rcvs.max()) + 1,
                 "offset_bins": int(offset_bins(g["offset"].max(), bin_m=est.offset_bin_m)) + 1}
        fp = _fingerprint({"v": STAGE_VERSION, "spectra": spectra_fps[rec.name], "exclude": exclude_bits,
                           "rp": hashlib.blake2b(rp.tobytes()).hexdigest(), "sp": hashlib.blake2b(sp.tobytes()).hexdigest(),
                           "offset_bin_m": est.offset_bin_m, "sizes": sizes, "group": est.shot_group_traces})
        ckpt = Checkpoints(store.path, "stats", rec.name, fp)
        wanted = []
        if not ckpt.is_done(0):
            # hash=False: equal objects scattered twice (empty pair sets of two swaths) would share one
            # key, and releasing the first would cancel the tasks of the second
            rp_f = client.scatter(rp, hash=False)
            groups = [np.flatnonzero(np.isin(g["shot"], shots) & g["live"])
                      for shots in _groups(g["shot"], est.shot_group_traces)]
            parts = _map_timed(client, receiver_pairs_task, str(store.path), rec.name,
                               [(rows, g["shot"][rows], g["receiver_index"][rows], rp_f) for rows in groups])
            wanted.append(("receiver_pairs", tree_sum(client, parts)))
        else:
            done_before.append((rec.name, "receiver_pairs"))
        if not ckpt.is_done(1):
            sp_f = client.scatter(sp, hash=False)
            parts = _map_timed(client, source_pairs_task, str(store.path), rec.name,
                               [(*_side(g, np.isin(g["receiver_index"], recv)), sp_f) for recv in
                                _groups(g["receiver_index"][g["receiver_index"] >= 0], est.shot_group_traces)])
            wanted.append(("source_pairs", tree_sum(client, parts)))
        else:
            done_before.append((rec.name, "source_pairs"))
        if not ckpt.is_done(2):
            bins = offset_bins(g["offset"], bin_m=est.offset_bin_m)
            parts = _map_timed(client, log_power_task, str(store.path), rec.name,
                               [(a, b, g["source_index"][a:b], g["receiver_index"][a:b], bins[a:b], g["live"][a:b],
                                 sizes) for a, b in rec.chunk_bounds()])
            wanted.append(("log_power", tree_sum(client, parts)))
        else:
            done_before.append((rec.name, "log_power"))
        for group, total in wanted:
            jobs.append((rec.name, group, client.submit(write_stats_task, str(store.path), rec.name, group,
                                                        total, fp, pure=False)))
        (report.stats_computed if wanted else report.stats_skipped).append(rec.name)
        report.fingerprints[rec.name] = fp
        # source pairs between this swath and each earlier one (owned by this one)
        for prev in records[:i]:
            gp = geoms[prev.name]
            between = _between(spairs, np.unique(gp["source_index"][gp["source_index"] >= 0]), srcs)
            common = np.intersect1d(gp["receiver_index"][gp["receiver_index"] >= 0], rcvs)
            if not len(between) or not len(common):
                continue
            key = f"{prev.name}+{rec.name}"
            fpx = _fingerprint({"v": STAGE_VERSION, "a": spectra_fps[prev.name], "b": spectra_fps[rec.name],
                                "exclude": exclude_bits, "pairs": hashlib.blake2b(between.tobytes()).hexdigest(),
                                "group": est.shot_group_traces})
            report.fingerprints[key] = fpx
            if Checkpoints(store.path, "stats", key, fpx).is_done(1):
                report.stats_skipped.append(key)
                done_before.append((key, "source_pairs"))
                continue
            bf = client.scatter(between, hash=False)
            parts = _map_timed(client, source_pairs_between_task, str(store.path), prev.name,
                               [(rec.name, _side(gp, np.isin(gp["receiver_index"], recv)),
                                 _side(g, np.isin(g["receiver_index"], recv)), bf)
                                for recv in _groups(_traces_at(common, gp, g), est.shot_group_traces)])
            jobs.append((key, "source_pairs", client.submit(write_stats_task, str(store.path), key, "source_pairs",
                                                            tree_sum(client, parts), fpx, pure=False)))
            report.stats_computed.append(key)
    runlog.write("stats", "start", jobs=len(jobs), resumed=len(done_before))
    for key, group in done_before:
        runlog.write("stats", "skip", key=key, group=group, reason="done in an earlier run")
    for n, (key, group, fut) in enumerate(jobs, 1):
        summary = fut.result()
        runlog.write("stats", "batch", key=key, group=group, **summary)
        if progress:
            progress("statistics", n, len(jobs))
        fault_point("stats")
    runlog.write("stats", "end", computed=report.stats_computed, skipped=report.stats_skipped)
    report.seconds = time.perf_counter() - t0
    return report
